//! End-to-end tests of the whole service: the real `ohmline` binary, real
//! databases (SQLite and PostgreSQL), real HTTP on loopback.

mod support;

mod access;
mod demo;
mod detection;
mod ingest;
mod invert;
mod limits;
mod load;
mod notify;
mod operations;
mod planning;
mod processing;
mod quality;
mod recovery;
mod review;
mod rules;
mod security;
mod series;
mod web;
