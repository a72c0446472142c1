//! Impurity measures and the proxies the split search maximises.
//!
//! Worked example (Gini): a node with class weights [3, 1] has impurity
//! 1 − (3² + 1²)/4² = 1 − 10/16 = 0.375. Entropy of [2, 2] is −2 · ½ · log2 ½ = 1 bit.

use std::fmt;

use crate::data::Task;

/// How a node's impurity is measured.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Criterion {
    /// Gini impurity, 1 − Σ p_k².
    Gini,
    /// Entropy in bits, −Σ p_k log2 p_k.
    Entropy,
    /// Squared error: the weighted variance of the target.
    SquaredError,
}

impl Criterion {
    pub fn as_str(self) -> &'static str {
        match self {
            Criterion::Gini => "gini",
            Criterion::Entropy => "entropy",
            Criterion::SquaredError => "squared_error",
        }
    }

    pub fn parse(s: &str) -> Option<Criterion> {
        match s {
            "gini" => Some(Criterion::Gini),
            "entropy" => Some(Criterion::Entropy),
            "squared_error" => Some(Criterion::SquaredError),
            _ => None,
        }
    }

    pub fn task(self) -> Task {
        match self {
            Criterion::Gini | Criterion::Entropy => Task::Classify,
            Criterion::SquaredError => Task::Regress,
        }
    }

    /// Impurity of a class-weight vector with total `w` (classification criteria).
    pub fn class_impurity(self, counts: &[f64], w: f64) -> f64 {
        match self {
            Criterion::Gini => {
                let sq: f64 = counts.iter().map(|c| c * c).sum();
                1.0 - sq / (w * w)
            }
            Criterion::Entropy => {
                let mut h = 0.0;
                for &c in counts {
                    if c > 0.0 {
                        let p = c / w;
                        h -= p * log2(p);
                    }
                }
                h
            }
            Criterion::SquaredError => unreachable!("squared error has no class impurity"),
        }
    }

    /// The quantity the split search maximises for a classification split: minus the
    /// weighted child impurities, −(w_L·I(L) + w_R·I(R)), up to a constant per node.
    #[inline(always)]
    pub(crate) fn class_proxy(self, left: &[f64], wl: f64, right: &[f64], wr: f64) -> f64 {
        match self {
            Criterion::Gini => {
                // w·(1 − Σc²/w²) = w − Σc²/w; the node's w is constant, so maximise Σc²/w.
                let mut sl = 0.0;
                let mut sr = 0.0;
                for k in 0..left.len() {
                    sl += left[k] * left[k];
                    sr += right[k] * right[k];
                }
                sl / wl + sr / wr
            }
            Criterion::Entropy => -(wl * self.class_impurity(left, wl) + wr * self.class_impurity(right, wr)),
            Criterion::SquaredError => unreachable!(),
        }
    }
}

/// Base-2 logarithm computed as ln(x)/ln(2), the form the reference library uses, so
/// entropies agree to the last bit.
#[inline]
pub fn log2(x: f64) -> f64 {
    x.ln() / std::f64::consts::LN_2
}

/// Squared-error proxy for a split with weighted target sums `sl`, `sr`: Σ_L²/w_L + Σ_R²/w_R.
#[inline(always)]
pub(crate) fn squared_error_proxy(sl: f64, wl: f64, sr: f64, wr: f64) -> f64 {
    sl * sl / wl + sr * sr / wr
}

impl fmt::Display for Criterion {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gini_worked_example() {
        // 1 − (9 + 1)/16 = 0.375
        assert_eq!(Criterion::Gini.class_impurity(&[3.0, 1.0], 4.0), 0.375);
        assert_eq!(Criterion::Gini.class_impurity(&[4.0, 0.0], 4.0), 0.0);
    }

    #[test]
    fn entropy_worked_example() {
        assert_eq!(Criterion::Entropy.class_impurity(&[2.0, 2.0], 4.0), 1.0);
        // Three equal classes: log2(3) = 1.5849625007211563
        let h = Criterion::Entropy.class_impurity(&[1.0, 1.0, 1.0], 3.0);
        assert!((h - 1.584_962_500_721_156_3).abs() < 1e-15);
    }
}
