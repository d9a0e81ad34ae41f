//! Sinks: consumers of the alert journal, each with its own cursor, so a slow or absent one never holds back
//! the desk or another sink.

pub(crate) mod subscribers;
