//! The one generator of random unit directions over parameter tensors, identified by (tensor,
//! flat index): K directions over every tensor, then K over each tensor alone.
//!
//! Only the generator's state at a direction's start is kept (the vector is drawn when it is
//! checked), so memory does not grow with directions × parameters, and a direction is the same
//! vector whichever thread, shard or order checks it.

use plumb_engine::Rng;

/// A random unit direction: what it spans and the generator state it is drawn from.
#[derive(Clone, Debug)]
pub struct Direction {
    /// `None` for a direction over every tensor, else the one tensor it moves.
    pub tensor: Option<usize>,
    rng: Rng,
}

impl Direction {
    /// The unit vector, one entry per parameter of each tensor of `sizes` it moves and none for
    /// the others (a direction over one tensor stores that tensor's entries alone): one normal
    /// per entry of the span, in tensor and flat order.
    pub fn vector(&self, sizes: &[usize]) -> Vec<Vec<f64>> {
        let mut rng = self.rng.clone();
        let mut v: Vec<Vec<f64>> = sizes
            .iter()
            .enumerate()
            .map(|(t, &n)| {
                if self.spans(t) {
                    (0..n).map(|_| rng.normal()).collect()
                } else {
                    Vec::new()
                }
            })
            .collect();
        let norm = v.iter().flatten().map(|x| x * x).sum::<f64>().sqrt();
        if norm > 0.0 {
            v.iter_mut().flatten().for_each(|x| *x /= norm);
        }
        v
    }

    /// Whether the direction moves tensor `t`.
    pub fn spans(&self, t: usize) -> bool {
        self.tensor.is_none_or(|s| s == t)
    }
}

/// `k` directions over every tensor, then `k` per tensor, from `seed`. Direction i is the vector
/// it would be if all were drawn here one after the other.
pub fn directions(sizes: &[usize], k: usize, seed: u64) -> Vec<Direction> {
    let mut rng = Rng::new(seed ^ 0xd1_7ec7);
    let mut out = Vec::with_capacity(k * (1 + sizes.len()));
    let scopes = std::iter::once(None).chain((0..sizes.len()).map(Some));
    for tensor in scopes {
        let draws = tensor.map_or(sizes.iter().sum(), |t| sizes[t]);
        for _ in 0..k {
            out.push(Direction {
                tensor,
                rng: rng.clone(),
            });
            for _ in 0..draws {
                rng.normal();
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Drawn on demand, each direction equals the eager drawing from one generator in order (what
    /// `check_external` drew before this module), and has norm 1.
    #[test]
    fn on_demand_equals_eager() {
        let sizes = [5, 1, 7];
        let k = 3;
        let lazy = directions(&sizes, k, 4);
        assert_eq!(lazy.len(), k * 4);
        let mut rng = Rng::new(4 ^ 0xd1_7ec7);
        for d in &lazy {
            let mut eager: Vec<Vec<f64>> = sizes
                .iter()
                .enumerate()
                .map(|(t, &n)| {
                    if d.tensor.is_none_or(|s| s == t) {
                        (0..n).map(|_| rng.normal()).collect()
                    } else {
                        Vec::new()
                    }
                })
                .collect();
            let norm = eager.iter().flatten().map(|x| x * x).sum::<f64>().sqrt();
            eager.iter_mut().flatten().for_each(|x| *x /= norm);
            let v = d.vector(&sizes);
            assert_eq!(v, eager, "{:?}", d.tensor);
            let n2: f64 = v.iter().flatten().map(|x| x * x).sum();
            assert!((n2 - 1.0).abs() < 1e-12);
        }
        assert!(std::mem::size_of::<Direction>() <= 64);
    }
}
