//! Breakdown's model: a valve gain stage, a cathode follower and a mode-switched Zener clamp as a wave digital
//! filter, in real volts. See `stage.rs` for the circuit as it reads on a schematic.

pub mod arith;
pub mod circuit;
pub mod devices;
pub mod parts;
pub mod pot;
pub mod solver;
pub mod stage;
pub mod wdf;

pub use circuit::{Circuit, CircuitError, Placement, Settings};
pub use stage::{Stage, StageProbe};
pub mod denormals;
pub mod engine;
pub mod fastmath;
pub mod measure;
pub mod oversampling;
pub mod packed;
pub mod smoothing;
pub mod units;

pub use engine::{Engine, Frame, Meters, Probe};
pub use oversampling::Quality;
