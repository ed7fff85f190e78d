//! Axis ranges with round tick values, and the linear map from values to pixels.

/// A "nice" number near `x` > 0: 1, 2 or 5 times a power of ten (Heckbert, "Nice numbers for
/// graph labels", Graphics Gems, 1990). `round` picks the nearest; otherwise the next above.
fn nice(x: f64, round: bool) -> f64 {
    let exponent = x.log10().floor();
    let power = 10f64.powf(exponent);
    let fraction = x / power;
    let nice_fraction = if round {
        if fraction < 1.5 {
            1.0
        } else if fraction < 3.0 {
            2.0
        } else if fraction < 7.0 {
            5.0
        } else {
            10.0
        }
    } else if fraction <= 1.0 {
        1.0
    } else if fraction <= 2.0 {
        2.0
    } else if fraction <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice_fraction * power
}

/// An axis from 0 to `top` with ticks every `step`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Axis {
    pub(crate) top: f64,
    pub(crate) step: f64,
}

impl Axis {
    /// The axis from 0 that holds `highest` with about `ticks` round ticks; a non-positive or
    /// non-finite `highest` gives 0–1.
    pub(crate) fn from_zero(highest: f64, ticks: usize) -> Axis {
        if !(highest.is_finite() && highest > 0.0) {
            return Axis {
                top: 1.0,
                step: 0.2,
            };
        }
        let step = nice(nice(highest, false) / (ticks.max(2) - 1) as f64, true);
        let top = (highest / step - 1e-9).ceil().max(1.0) * step;
        Axis { top, step }
    }

    /// The tick values 0, step, …, top.
    pub(crate) fn ticks(&self) -> Vec<f64> {
        let count = (self.top / self.step).round() as usize;
        (0..=count).map(|i| i as f64 * self.step).collect()
    }

    /// A tick value written with as many decimals as the step needs.
    pub(crate) fn label(&self, value: f64) -> String {
        let decimals = (-self.step.log10().floor()).max(0.0) as usize;
        format!("{value:.decimals$}")
    }
}

/// The linear map from a value range onto a pixel range.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Linear {
    pub(crate) from: (f64, f64),
    pub(crate) to: (f64, f64),
}

impl Linear {
    pub(crate) fn map(&self, value: f64) -> f64 {
        let (a, b) = self.from;
        let (p, q) = self.to;
        p + (value - a) / (b - a) * (q - p)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn axes_hold_the_highest_value_with_round_ticks() {
        assert_eq!(
            Axis::from_zero(34.5, 6),
            Axis {
                top: 40.0,
                step: 10.0
            }
        );
        assert_eq!(
            Axis::from_zero(83.0, 6),
            Axis {
                top: 100.0,
                step: 20.0
            }
        );
        assert_eq!(
            Axis::from_zero(1.67, 6),
            Axis {
                top: 2.0,
                step: 0.5
            }
        );
        assert_eq!(
            Axis::from_zero(20.0, 6),
            Axis {
                top: 20.0,
                step: 5.0
            }
        );
        assert_eq!(
            Axis::from_zero(0.0, 6),
            Axis {
                top: 1.0,
                step: 0.2
            }
        );
        let axis = Axis::from_zero(1.67, 6);
        assert_eq!(axis.ticks(), [0.0, 0.5, 1.0, 1.5, 2.0]);
        assert_eq!(axis.label(1.5), "1.5");
        assert_eq!(Axis::from_zero(34.5, 6).label(30.0), "30");
    }

    #[test]
    fn the_linear_map_hits_both_ends() {
        let map = Linear {
            from: (0.0, 40.0),
            to: (100.0, 500.0),
        };
        assert_eq!(map.map(0.0), 100.0);
        assert_eq!(map.map(40.0), 500.0);
        assert_eq!(map.map(10.0), 200.0);
    }
}
