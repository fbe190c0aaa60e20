//! The integration tests, one binary: the command line, the cache and end-to-end runs. Each
//! module is one area; `common` (small studies of test ops) and `reliability` (the demo study
//! in temporary folders, damage, concurrent runs) are the shared harness.

mod archive;
mod bad_inputs;
mod cli;
mod cluster;
mod common;
mod concurrent;
mod damage;
mod demo;
mod exports;
mod interrupt;
mod recipes;
mod reliability;
mod report;
mod room;
mod runner;
mod slabs;
mod stale;
mod streaming;
mod sweep;
