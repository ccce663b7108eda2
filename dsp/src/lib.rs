//! Breakdown's model: a builder's valve preamp from the input jack (gain stages, cathode follower, the
//! mode-switched Zener pair, the level pot and the tone stack) solved as one circuit, in real volts.
//!
//! The parts (`elements.rs`, `devices/`) are assembled from the circuit file (`circuit/`) into a node list in
//! `netlist.rs`, the one place that reads like the schematic; `nodal.rs` solves the node equations at every
//! sample; `engine.rs` adds calibration, oversampling, knob glides, probes and meters.

pub mod arith;
pub mod band;
pub mod cabinet;
pub mod circuit;
pub mod condense;
pub mod denormals;
pub mod devices;
pub mod elements;
pub mod engine;
pub mod fastmath;
pub mod lane;
pub mod lanes;
pub mod measure;
pub mod netlist;
pub mod nodal;
pub mod oversampling;
pub mod parts;
pub mod pot;
pub mod smoothing;
pub mod units;
pub mod wav;

pub use circuit::{Circuit, CircuitError, Placement, Settings};
pub use elements::Knob;
pub use engine::{Engine, Frame, Meters, Probe, Readout};
pub use oversampling::Quality;
