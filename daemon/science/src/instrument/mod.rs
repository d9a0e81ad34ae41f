//! Instrument descriptions shared by the config, the simulator, the engine and the reach: what a site or orbit
//! sees, how the detector responds (effective area, PSF, energy resolution), and its background.

pub mod spec;

pub use spec::{
    AreaTable, BackgroundSpec, CurveTable, InstrumentSpec, ResponseSpec, SiteSpec, SpecProblem,
};
