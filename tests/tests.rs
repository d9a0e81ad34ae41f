//! glint's integration tests: each module drives the real `glint` binary (built by cargo for this test
//! binary) over real files and loopback sockets.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report

mod bus;
mod checks;
mod cli;
mod contract;
mod email;
mod health;
mod hostile;
mod inputs;
mod journal;
mod layout;
mod listen_exec;
mod live;
mod replay;
mod restart;
mod service;
mod tls;
mod tune;
mod util;
mod withdrawals;
