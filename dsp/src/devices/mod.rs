//! Nonlinear devices, each described by its terminal currents and their derivatives.
//! Devices know nothing of the solver: the stage hands their currents to the root of the wave tree.

pub mod triode;
pub mod zener;

pub use triode::{Triode, TubeType};
pub use zener::{Zener, ZenerPair};
