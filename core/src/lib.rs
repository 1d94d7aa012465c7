//! ohmline-core: the pure computation behind ohmline.
//!
//! Everything here takes data in memory and returns data: no I/O, no async, no
//! clock, no environment. The server crate owns storage, HTTP, jobs and email and
//! calls into this crate.
//!
//! Conventions (every module follows them): `x` chainage in metres along the line,
//! `z` elevation in metres (up positive), resistivity ρ in Ω·m, current I in mA,
//! potential U in mV, transfer resistance R = U/I in Ω.
#![deny(missing_docs)]

pub mod alerts;
pub mod bessel;
pub mod depth;
pub mod doi;
pub mod errormodel;
pub mod figures;
pub mod forward;
pub mod geometry;
pub mod inversion;
pub mod mesh;
pub mod model;
pub mod noise;
pub mod planning;
pub mod qc;
pub mod roughness;
pub mod scenario;
pub mod section;
pub mod sensitivity;
pub mod sequence;
pub mod temperature;
pub mod timelapse;
pub mod wavenumbers;
pub mod zones;
