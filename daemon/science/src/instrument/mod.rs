//! Instrument descriptions shared by the config, the simulator, the engine and the reach: what a site or orbit
//! sees, how the detector responds (effective area, PSF, energy resolution), and its background.

pub mod acceptance;
pub mod response;
pub mod spec;

pub use acceptance::{Acceptance, acceptance_density};
pub use response::InstrumentResponse;
pub use spec::{AreaTable, BackgroundSpec, CurveTable, InstrumentSpec, ResponseSpec, SiteSpec, SpecProblem};
