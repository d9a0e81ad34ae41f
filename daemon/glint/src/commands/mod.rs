//! One file per subcommand, each thin: parse its arguments, call the service, the clients or the engine,
//! print. Nothing below this folder imports from it.

pub(crate) mod bench_bus;
pub(crate) mod bench_live;
pub(crate) mod calibrate;
pub(crate) mod check_config;
pub(crate) mod coincide;
pub(crate) mod demo;
pub(crate) mod feed;
pub(crate) mod import;
pub(crate) mod journal;
pub(crate) mod listen;
pub(crate) mod reach;
pub(crate) mod replay;
pub(crate) mod run;
pub(crate) mod simulate;
pub(crate) mod status;
pub(crate) mod test_alert;
pub(crate) mod tune;
pub(crate) mod withdraw;
