//! ohmline-server: the service around ohmline-core — HTTP API, storage on SQLite
//! or PostgreSQL, ingest of meter uploads, and the `ohmline` command line.
//!
//! Data flows one way: meter → ingest (raw stored first) → quality control →
//! inversion → change zones → alerts → notifications and pages. Each stage reads
//! what the previous one stored.

pub mod api;
pub mod app;
pub mod auth;
pub mod cli;
pub mod config;
pub mod db;
pub mod demo;
pub mod error;
pub mod files;
pub mod ingest;
pub mod limits;
pub mod loadgen;
pub mod metrics;
pub mod notify;
pub mod pipeline;
pub mod series;
pub mod survey;
pub mod web;
pub mod worker;

pub use app::{AppState, router, serve};
