use super::OPEN_RESISTANCE;

/// A one-port in a wave tree: reports its port resistance, reflects a wave up, takes the incident wave down.
pub trait WaveElement {
    /// Port resistance R (ohm).
    fn port_resistance(&self) -> f64;
    /// Reflected wave b = v - R i, computed from the element's state and its children.
    fn reflected(&mut self) -> f64;
    /// Incident wave a = v + R i from the parent; updates the element and its children.
    fn incident(&mut self, a: f64);
    /// Port voltage v = (a + b) / 2 after the last incident wave.
    fn voltage(&self) -> f64;
    /// Port current i = (a - b) / 2R after the last incident wave (A, into the + terminal).
    fn current(&self) -> f64;
    /// Recompute cached adaptor coefficients after any port resistance below changed (resistor values,
    /// capacitor discretisation). Leaves have nothing cached.
    fn refresh(&mut self) {}
}

/// Last waves seen at a port, for voltage and current readouts.
#[derive(Clone, Copy, Debug, Default)]
struct Waves {
    a: f64,
    b: f64,
}

impl Waves {
    fn voltage(&self) -> f64 {
        0.5 * (self.a + self.b)
    }
    fn current(&self, r: f64) -> f64 {
        0.5 * (self.a - self.b) / r
    }
}

/// Resistor, v = R i, so b = 0.
#[derive(Clone, Debug)]
pub struct Resistor {
    resistance: f64,
    /// The last incident wave (the reflected one is always 0).
    incident: f64,
}

impl Resistor {
    pub fn new(resistance: f64) -> Self {
        Resistor {
            resistance,
            incident: 0.0,
        }
    }
    pub fn set_resistance(&mut self, resistance: f64) {
        self.resistance = resistance;
    }
}

impl WaveElement for Resistor {
    fn port_resistance(&self) -> f64 {
        self.resistance
    }
    fn reflected(&mut self) -> f64 {
        0.0
    }
    fn incident(&mut self, a: f64) {
        self.incident = a;
    }
    fn voltage(&self) -> f64 {
        Waves {
            a: self.incident,
            b: 0.0,
        }
        .voltage()
    }
    fn current(&self) -> f64 {
        if self.resistance == 0.0 {
            0.0
        } else {
            Waves {
                a: self.incident,
                b: 0.0,
            }
            .current(self.resistance)
        }
    }
}

/// Capacitor, i = C dv/dt by the trapezoidal rule (bilinear transform): R = T / 2C, b[n] = a[n-1].
#[derive(Clone, Debug)]
pub struct Capacitor {
    capacitance: f64,
    resistance: f64,
    open: bool,
    /// The last waves; the incident one is the state (b[n] = a[n-1]).
    waves: Waves,
}

impl Capacitor {
    /// A capacitor of `capacitance` farads; 0 F is an open circuit.
    pub fn new(capacitance: f64) -> Self {
        Capacitor {
            capacitance,
            resistance: OPEN_RESISTANCE,
            open: true,
            waves: Waves::default(),
        }
    }

    /// Discretise at sample period `period` (s), or hold open (DC analysis) when `period` is None.
    pub fn discretise(&mut self, period: Option<f64>) {
        match period {
            Some(t) if self.capacitance > 0.0 => {
                self.resistance = t / (2.0 * self.capacitance);
                self.open = false;
            }
            _ => {
                self.resistance = OPEN_RESISTANCE;
                self.open = true;
            }
        }
    }

    /// Start from a charged state holding `volts` with no current.
    pub fn charge_to(&mut self, volts: f64) {
        self.waves = Waves { a: volts, b: volts };
    }
}

impl WaveElement for Capacitor {
    fn port_resistance(&self) -> f64 {
        self.resistance
    }
    fn reflected(&mut self) -> f64 {
        self.waves.b = if self.open { 0.0 } else { self.waves.a };
        self.waves.b
    }
    fn incident(&mut self, a: f64) {
        self.waves.a = a;
    }
    fn voltage(&self) -> f64 {
        self.waves.voltage()
    }
    fn current(&self) -> f64 {
        self.waves.current(self.resistance)
    }
}

/// Voltage source with series resistance, v = Vs + R i, so b = Vs.
#[derive(Clone, Debug)]
pub struct ResistiveVoltageSource {
    pub volts: f64,
    resistance: f64,
    waves: Waves,
}

impl ResistiveVoltageSource {
    pub fn new(volts: f64, resistance: f64) -> Self {
        ResistiveVoltageSource {
            volts,
            resistance,
            waves: Waves::default(),
        }
    }
}

impl WaveElement for ResistiveVoltageSource {
    fn port_resistance(&self) -> f64 {
        self.resistance
    }
    fn reflected(&mut self) -> f64 {
        self.waves.b = self.volts;
        self.volts
    }
    fn incident(&mut self, a: f64) {
        self.waves.a = a;
    }
    fn voltage(&self) -> f64 {
        self.waves.voltage()
    }
    fn current(&self) -> f64 {
        self.waves.current(self.resistance)
    }
}

/// Series adaptor, v = v1 + v2, i = i1 = i2: R = R1 + R2, b = b1 + b2, a1 = b1 + (R1/R)(a - b).
/// R and R1/R are cached: call `refresh` after changing a child's resistance.
#[derive(Clone, Debug)]
pub struct Series<A, B> {
    pub first: A,
    pub second: B,
    waves: Waves,
    reflected_first: f64,
    resistance: f64,
    first_share: f64,
}

impl<A: WaveElement, B: WaveElement> Series<A, B> {
    pub fn new(first: A, second: B) -> Self {
        let mut series = Series {
            first,
            second,
            waves: Waves::default(),
            reflected_first: 0.0,
            resistance: 0.0,
            first_share: 0.0,
        };
        series.refresh();
        series
    }
}

impl<A: WaveElement, B: WaveElement> WaveElement for Series<A, B> {
    fn port_resistance(&self) -> f64 {
        self.resistance
    }
    #[inline]
    fn reflected(&mut self) -> f64 {
        self.reflected_first = self.first.reflected();
        self.waves.b = self.reflected_first + self.second.reflected();
        self.waves.b
    }
    #[inline]
    fn incident(&mut self, a: f64) {
        self.waves.a = a;
        let excess = a - self.waves.b;
        let a1 = self.reflected_first + self.first_share * excess;
        self.first.incident(a1);
        self.second.incident(a - a1);
    }
    fn voltage(&self) -> f64 {
        self.waves.voltage()
    }
    fn current(&self) -> f64 {
        self.waves.current(self.port_resistance())
    }
    fn refresh(&mut self) {
        self.first.refresh();
        self.second.refresh();
        let r1 = self.first.port_resistance();
        self.resistance = r1 + self.second.port_resistance();
        self.first_share = r1 / self.resistance;
    }
}

/// Parallel adaptor, v = v1 = v2, i = i1 + i2: G = G1 + G2, b = (G1 b1 + G2 b2)/G, ak = 2v - bk.
/// R and G1/G, G2/G are cached: call `refresh` after changing a child's resistance.
#[derive(Clone, Debug)]
pub struct Parallel<A, B> {
    pub first: A,
    pub second: B,
    waves: Waves,
    reflected_first: f64,
    reflected_second: f64,
    resistance: f64,
    first_weight: f64,
    second_weight: f64,
}

impl<A: WaveElement, B: WaveElement> Parallel<A, B> {
    pub fn new(first: A, second: B) -> Self {
        let mut parallel = Parallel {
            first,
            second,
            waves: Waves::default(),
            reflected_first: 0.0,
            reflected_second: 0.0,
            resistance: 0.0,
            first_weight: 0.0,
            second_weight: 0.0,
        };
        parallel.refresh();
        parallel
    }
}

impl<A: WaveElement, B: WaveElement> WaveElement for Parallel<A, B> {
    fn port_resistance(&self) -> f64 {
        self.resistance
    }
    #[inline]
    fn reflected(&mut self) -> f64 {
        self.reflected_first = self.first.reflected();
        self.reflected_second = self.second.reflected();
        self.waves.b =
            self.first_weight * self.reflected_first + self.second_weight * self.reflected_second;
        self.waves.b
    }
    #[inline]
    fn incident(&mut self, a: f64) {
        self.waves.a = a;
        let v = 0.5 * (a + self.waves.b);
        self.first.incident(2.0 * v - self.reflected_first);
        self.second.incident(2.0 * v - self.reflected_second);
    }
    fn voltage(&self) -> f64 {
        self.waves.voltage()
    }
    fn current(&self) -> f64 {
        self.waves.current(self.port_resistance())
    }
    fn refresh(&mut self) {
        self.first.refresh();
        self.second.refresh();
        let g1 = 1.0 / self.first.port_resistance();
        let g2 = 1.0 / self.second.port_resistance();
        let g = g1 + g2;
        self.resistance = 1.0 / g;
        self.first_weight = g1 / g;
        self.second_weight = g2 / g;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn series_divider_splits_voltage_by_resistance() {
        // Ohm's law: a 10 V source with 1 k into 1 k + 3 k gives 10/5 mA through all, 2 V and 6 V.
        let mut net = Series::new(Resistor::new(1e3), Resistor::new(3e3));
        let source = 10.0;
        let r_src = 1e3;
        let b = net.reflected();
        let r = net.port_resistance();
        // Root: ideal node between source (Vs, Rs) and the tree: v = (Vs R + b Rs)/(R + Rs).
        let v = (source * r + b * r_src) / (r + r_src);
        net.incident(2.0 * v - b);
        assert!((net.first.voltage() - 2.0).abs() < 1e-12);
        assert!((net.second.voltage() - 6.0).abs() < 1e-12);
        assert!((net.current() - 2e-3).abs() < 1e-15);
    }

    #[test]
    fn capacitor_charges_with_rc_time_constant() {
        // RC charging, v(t) = V (1 - exp(-t/RC)). A step seen by the trapezoidal rule is a ramp over the first
        // period, so the response trails by T/2: allow e^-1 T / 2RC plus O(T^2).
        let (r, c, t) = (1e3, 1e-6, 1e-6);
        let mut cap = Capacitor::new(c);
        cap.discretise(Some(t));
        let mut v = 0.0;
        for _ in 0..1000 {
            let b = cap.reflected();
            let rc = cap.port_resistance();
            v = (1.0 * rc + b * r) / (rc + r);
            cap.incident(2.0 * v - b);
        }
        let expected = 1.0 - (-1e-3f64 / (r * c)).exp();
        let half_step = (-1.0f64).exp() * t / (2.0 * r * c);
        assert!((v - expected).abs() < 1.05 * half_step, "{v} vs {expected}");
    }
}
