//! glint's integration tests: each module drives the real `glint` binary (built by cargo for this test
//! binary) over real files and loopback sockets.

mod live;
mod util;
