//! A setpoint that moves towards its target no faster than a given rate.

/// A rate-limited setpoint.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ramp {
    /// The value in use now.
    pub value: f64,
    /// Where it is heading.
    pub target: f64,
    /// Largest change per second (> 0).
    pub rate_per_s: f64,
}

impl Ramp {
    /// A ramp resting at `value`.
    pub fn at(value: f64, rate_per_s: f64) -> Self {
        Ramp {
            value,
            target: value,
            rate_per_s,
        }
    }

    /// Moves the value towards the target by at most `rate·dt`; returns the new value.
    pub fn advance(&mut self, dt_s: f64) -> f64 {
        let max = self.rate_per_s * dt_s.max(0.0);
        let d = (self.target - self.value).clamp(-max, max);
        self.value += d;
        self.value
    }

    /// Whether the value has reached the target.
    pub fn settled(&self) -> bool {
        self.value == self.target
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ramps_at_rate_then_lands_exactly() {
        let mut r = Ramp::at(0.0, 0.5);
        r.target = 1.2;
        assert_eq!(r.advance(1.0), 0.5);
        assert_eq!(r.advance(1.0), 1.0);
        assert_eq!(r.advance(1.0), 1.2);
        assert!(r.settled());
        r.target = -0.3;
        assert_eq!(r.advance(1.0), 0.7);
    }
}
