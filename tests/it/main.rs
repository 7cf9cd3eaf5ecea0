//! Integration tests: the real server on 127.0.0.1:0 with a real SQLite
//! file, spoken to by a real tonic client.

mod agent;
mod alerts;
mod bounds;
mod browser;
mod calibration;
mod chunks;
mod cli;
mod console;
mod crash;
mod faults;
mod flood;
mod harness;
mod history;
mod hostile;
mod import;
mod metrics;
mod notify;
mod scale;
mod security;
mod service;
mod surface;
mod truth;
mod web;
