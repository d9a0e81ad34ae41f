//! glint's simulated observatories: a scenario (an instrument and its sources) becomes a deterministic stream
//! of producer frames, the same bytes on every machine for the same seed.

pub mod sky;
