//! ohmline-server: the service around ohmline-core.
