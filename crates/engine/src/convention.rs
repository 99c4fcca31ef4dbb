//! The conventions a loss is written under (DESIGN §4.1): how the data term reduces over the batch,
//! what the L2 term is divided by, and whether the biases decay. Code written under any of them is
//! correct; the reference follows the one the description declares.

use std::fmt;

/// How the data term reduces over the m samples of a batch.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash)]
pub enum Reduction {
    /// (1/m) Σ over the samples: the default.
    #[default]
    Mean,
    /// Σ over the samples.
    Sum,
}

impl Reduction {
    pub const ALL: [Reduction; 2] = [Reduction::Mean, Reduction::Sum];

    pub fn name(&self) -> &'static str {
        match self {
            Reduction::Mean => "mean",
            Reduction::Sum => "sum",
        }
    }

    pub fn from_name(name: &str) -> Option<Reduction> {
        Reduction::ALL.into_iter().find(|r| r.name() == name)
    }

    /// What the sum over the samples is multiplied by: 1/m or 1.
    pub fn factor(&self, m: usize) -> f64 {
        match self {
            Reduction::Mean => 1.0 / m as f64,
            Reduction::Sum => 1.0,
        }
    }
}

/// The divisor of the L2 term (λ / divisor) · Σ w².
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash)]
pub enum L2Divisor {
    /// 2m: the default.
    #[default]
    TwoM,
    Two,
    M,
    One,
}

impl L2Divisor {
    pub const ALL: [L2Divisor; 4] = [
        L2Divisor::TwoM,
        L2Divisor::Two,
        L2Divisor::M,
        L2Divisor::One,
    ];

    pub fn name(&self) -> &'static str {
        match self {
            L2Divisor::TwoM => "2m",
            L2Divisor::Two => "2",
            L2Divisor::M => "m",
            L2Divisor::One => "1",
        }
    }

    pub fn from_name(name: &str) -> Option<L2Divisor> {
        L2Divisor::ALL.into_iter().find(|d| d.name() == name)
    }

    /// The divisor's value for a batch of m samples.
    pub fn value(&self, m: usize) -> f64 {
        let m = m as f64;
        match self {
            L2Divisor::TwoM => 2.0 * m,
            L2Divisor::Two => 2.0,
            L2Divisor::M => m,
            L2Divisor::One => 1.0,
        }
    }
}

impl fmt::Display for Reduction {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl fmt::Display for L2Divisor {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The conventions of a loss; `Conventions::default()` is plumb's default (mean, 2m, no bias decay).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash)]
pub struct Conventions {
    pub reduction: Reduction,
    pub l2_divisor: L2Divisor,
    /// Whether the L2 term covers the bias weights too.
    pub l2_on_bias: bool,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for r in Reduction::ALL {
            assert_eq!(Reduction::from_name(r.name()), Some(r));
        }
        for d in L2Divisor::ALL {
            assert_eq!(L2Divisor::from_name(d.name()), Some(d));
        }
        assert_eq!(L2Divisor::from_name("2M"), None);
    }

    #[test]
    fn the_default_is_lambda_over_2m() {
        // d/dw (λ/2m)·w² = (λ/m)·w; under divisor "2": λ·w.
        let c = Conventions::default();
        assert_eq!(c.l2_divisor, L2Divisor::TwoM);
        let slope = |d: L2Divisor| 2.0 * 0.3 / d.value(10);
        assert_eq!(slope(c.l2_divisor), 0.3 / 10.0);
        assert_eq!(slope(L2Divisor::Two), 0.3);
        assert_eq!(Reduction::Sum.factor(10), 1.0);
    }
}
