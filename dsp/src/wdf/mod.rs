//! Wave digital filter building blocks (Fettweis, "Wave digital filters: theory and practice", Proc. IEEE
//! 74(2), 1986). Voltage waves with port resistance R: a = v + R i incident on an element, b = v - R i
//! reflected by it, i flowing into the element's + terminal. Adaptors here keep polarity (series: v = v1 + v2).

mod elements;
pub mod root;

pub use elements::{Capacitor, Parallel, ResistiveVoltageSource, Resistor, Series, WaveElement};
pub use root::RTypeRoot;

/// Port resistance that stands for an open circuit (ohm): a capacitor at DC.
pub const OPEN_RESISTANCE: f64 = 1e15;
