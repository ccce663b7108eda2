//! The one glide of the project: a one-pole (exponential) approach of a value toward its target, so that a
//! control moved by a person or by automation never steps (a step in a gain or a pot is a click).
//!
//! After a step of the target the value covers 1 - 1/e (63%) of the distance in `seconds` and snaps to the
//! target once it is within 1e-9 of it, so a glide ends and a value at rest is the target exactly.

/// Distance below which a glide snaps to its target.
const SNAP: f64 = 1e-9;

/// A value gliding toward a target with a one-pole low-pass, one step per sample.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Glide {
    value: f64,
    target: f64,
    coeff: f64,
}

impl Glide {
    /// At rest at `value`, gliding with time constant `seconds` at `rate` steps per second. A time constant
    /// of zero (or less, or not finite) makes every move instant.
    pub fn new(value: f64, seconds: f64, rate: f64) -> Glide {
        let coeff = if seconds > 0.0 && seconds.is_finite() && rate > 0.0 && rate.is_finite() {
            1.0 - (-1.0 / (seconds * rate)).exp()
        } else {
            1.0
        };
        Glide {
            value,
            target: value,
            coeff,
        }
    }

    /// The per-step coefficient (the share of the remaining distance covered each step).
    pub fn coefficient(&self) -> f64 {
        self.coeff
    }

    /// Glide toward `target` from where the value is now. A target that is not finite is ignored.
    #[inline]
    pub fn set_target(&mut self, target: f64) {
        if target.is_finite() {
            self.target = target;
        }
    }

    /// Be at `value` at once, at rest (for a reset: no glide from the old value). Ignored if not finite.
    pub fn jump(&mut self, value: f64) {
        if value.is_finite() {
            self.value = value;
            self.target = value;
        }
    }

    /// End the glide now: the value becomes the target.
    pub fn settle(&mut self) {
        self.value = self.target;
    }

    /// One step; returns the new value.
    #[inline]
    pub fn step(&mut self) -> f64 {
        if self.value == self.target {
            // At rest: the step below would add zero and snap to the target, so return the target directly.
            return self.target;
        }
        self.value += (self.target - self.value) * self.coeff;
        if (self.target - self.value).abs() < SNAP {
            self.value = self.target;
        }
        self.value
    }

    /// The value now (without stepping).
    pub fn value(&self) -> f64 {
        self.value
    }

    pub fn target(&self) -> f64 {
        self.target
    }

    /// True while the value has not reached its target.
    pub fn moving(&self) -> bool {
        self.value != self.target
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A one-pole low-pass driven by a step reaches 1 - e^(-t/tau) of it after time t (the step response of a
    /// first-order system, general reference math): 63.2% after one time constant, 95.0% after three.
    #[test]
    fn step_response_is_first_order() {
        let rate = 48_000.0;
        let tau = 0.01;
        let mut g = Glide::new(0.0, tau, rate);
        g.set_target(1.0);
        let steps = (tau * rate) as usize;
        let mut v = 0.0;
        for _ in 0..steps {
            v = g.step();
        }
        assert!((v - (1.0 - (-1.0f64).exp())).abs() < 1e-3, "{v}");
        for _ in 0..2 * steps {
            v = g.step();
        }
        assert!((v - (1.0 - (-3.0f64).exp())).abs() < 1e-3, "{v}");
    }

    #[test]
    fn ends_on_the_target_and_ignores_non_finite_targets() {
        let mut g = Glide::new(2.0, 0.001, 48_000.0);
        g.set_target(5.0);
        for _ in 0..10_000 {
            g.step();
        }
        assert_eq!(g.value(), 5.0);
        assert!(!g.moving());
        g.set_target(f64::NAN);
        g.set_target(f64::INFINITY);
        assert_eq!(g.step(), 5.0);
        g.jump(1.0);
        assert_eq!((g.value(), g.target()), (1.0, 1.0));
        let mut instant = Glide::new(0.0, 0.0, 48_000.0);
        instant.set_target(3.0);
        assert_eq!(instant.step(), 3.0);
    }
}
