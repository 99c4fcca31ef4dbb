//! Units that cannot be told apart. Units with identical incoming weights (bias included) compute
//! the same activation on every input. When their outgoing weights are identical too, they also
//! receive the same gradient, so gradient descent keeps them identical for ever (Goodfellow, Bengio &
//! Courville, Deep Learning §8.4: equal weights do not break symmetry); when their outgoing weights
//! differ, their gradients differ and training can still separate them.

use ndarray::ArrayView1;

/// A group of units of one layer with identical incoming rows.
#[derive(Clone, Debug, PartialEq)]
pub struct SymmetricGroup {
    /// 1-based layer, as the description counts its `[[layer]]` blocks.
    pub layer: usize,
    /// 1-based units within the layer.
    pub units: Vec<usize>,
    /// Subsets (1-based units, two or more each) whose outgoing columns in the next layer are
    /// identical as well: indistinguishable for ever. Empty for the output layer.
    pub inseparable: Vec<Vec<usize>>,
}

/// Groups (indices into `vectors`, two or more each) of vectors equal to the relative tolerance.
///
/// The groups are the ones a scan of every pair in order would form: vector `i`, unless an earlier
/// one took it, leads a group of every later vector `j` within the tolerance of it that no earlier
/// leader took. Comparing every pair costs units² × fan-in (a second on a 1024-unit layer); here
/// each vector is first reduced to its projection on one fixed direction of norm 1, which moves by
/// at most the distance between two vectors, so only vectors whose projections lie within the
/// largest distance the tolerance allows are compared, exactly, as the pairwise scan compares
/// them. For random weights that is almost no pair; identical rows are taken by their leader in
/// one pass. Only a tolerance of ½ or more falls back to every pair.
pub(crate) fn equal_groups(vectors: &[ArrayView1<f64>], tolerance: f64) -> Vec<Vec<usize>> {
    let n = vectors.len();
    let norms: Vec<f64> = vectors.iter().map(|r| norm(*r)).collect();
    // A vector with a non-finite value or norm has its own finding and is no evidence of symmetry.
    let usable: Vec<bool> = norms.iter().map(|n| n.is_finite()).collect();
    let len = vectors.iter().map(|v| v.len()).max().unwrap_or(0);
    let sketch: Vec<f64> = vectors.iter().map(|r| projection(*r)).collect();
    let mut order: Vec<usize> = (0..n).filter(|&i| usable[i]).collect();
    order.sort_by(|&a, &b| sketch[a].total_cmp(&sketch[b]));
    let sorted: Vec<f64> = order.iter().map(|&i| sketch[i]).collect();
    let reach = Reach::new(tolerance, len);
    let mut group: Vec<usize> = (0..n).collect();
    for i in 0..n {
        if group[i] != i || !usable[i] {
            continue;
        }
        let w = reach.window(norms[i]);
        let lo = sorted.partition_point(|&s| s < sketch[i] - w);
        let hi = sorted.partition_point(|&s| s <= sketch[i] + w).max(lo);
        // Within one leader's pass, taking j changes nothing for another j: order is free.
        for &j in &order[lo..hi] {
            if j <= i || group[j] != j {
                continue;
            }
            if distance(vectors[i], vectors[j]) <= tolerance * norms[i].max(norms[j]) {
                group[j] = i;
            }
        }
    }
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); n];
    for (k, &leader) in group.iter().enumerate() {
        members[leader].push(k);
    }
    members.into_iter().filter(|m| m.len() > 1).collect()
}

/// ‖v‖₂, summed in order.
fn norm(v: ArrayView1<f64>) -> f64 {
    v.iter().map(|v| v * v).sum::<f64>().sqrt()
}

/// ‖a − b‖₂, summed in order: the figure the tolerance is held against.
fn distance(a: ArrayView1<f64>, b: ArrayView1<f64>) -> f64 {
    a.iter()
        .zip(b.iter())
        .map(|(a, b)| (a - b) * (a - b))
        .sum::<f64>()
        .sqrt()
}

/// v · p for a fixed p of ±1/√n with signs from a hash of the index: |p · (a − b)| ≤ ‖a − b‖.
fn projection(v: ArrayView1<f64>) -> f64 {
    let c = 1.0 / (v.len().max(1) as f64).sqrt();
    v.iter()
        .enumerate()
        .map(|(k, &x)| {
            let h = (k as u64 ^ 0x9e37_79b9_7f4a_7c15).wrapping_mul(0xbf58_476d_1ce4_e5b9);
            if h >> 63 == 0 { c * x } else { -c * x }
        })
        .sum()
}

/// How far apart two vectors' projections may lie when they are equal to the tolerance.
///
/// With exact arithmetic, ‖a − b‖ ≤ τ·max(‖a‖, ‖b‖) and ‖b‖ ≤ ‖a‖ + ‖a − b‖ give
/// ‖a − b‖ ≤ τ/(1 − τ)·‖a‖, and the projections differ by no more. Each computed sum of n terms is
/// within γ = n·ε/(1 − n·ε) of its value (relative to ‖·‖ for the projection); the window widens
/// τ by (1 + γ)², the bound by another (1 + γ)², and adds 3γ‖a‖ for the two projections' own
/// rounding, with γ taken four times over.
struct Reach {
    /// τ/(1 − τ) widened, or ∞ when τ is ½ or more (every pair is compared).
    factor: f64,
    slack: f64,
}

impl Reach {
    fn new(tolerance: f64, len: usize) -> Self {
        let gamma = 4.0 * (len as f64 + 4.0) * f64::EPSILON;
        let tau = tolerance * (1.0 + gamma).powi(2);
        let factor = if tau < 0.5 {
            tau / (1.0 - tau) * (1.0 + gamma).powi(2)
        } else {
            f64::INFINITY
        };
        Reach {
            factor,
            slack: 3.0 * gamma,
        }
    }

    fn window(&self, norm: f64) -> f64 {
        if self.factor.is_infinite() {
            f64::INFINITY
        } else {
            (self.factor + self.slack) * norm
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn groups(m: &ndarray::Array2<f64>, tolerance: f64) -> Vec<Vec<usize>> {
        let rows: Vec<ArrayView1<f64>> = m.rows().into_iter().collect();
        equal_groups(&rows, tolerance)
    }

    #[test]
    fn finds_equal_and_nearly_equal_rows_only() {
        let w = array![
            [0.1, 0.5, -0.2],
            [0.3, 0.1, 0.9],
            [0.1, 0.5, -0.2 + 1e-9],
            [0.1, 0.5, -0.21],
        ];
        assert_eq!(groups(&w, 1e-6), vec![vec![0, 2]]);
        assert_eq!(groups(&w, 1e-12), Vec::<Vec<usize>>::new());
        // Rows whose norm is infinite (an Inf, or squares that overflow) match nothing.
        let w = array![
            [f64::INFINITY, 1.0],
            [1.0, f64::INFINITY],
            [1e300, 1e300],
            [-1e300, 1e300]
        ];
        assert_eq!(groups(&w, 1e-6), Vec::<Vec<usize>>::new());
    }

    /// The scan of every pair this module replaced: the definition the groups keep.
    fn pairwise(vectors: &[ArrayView1<f64>], tolerance: f64) -> Vec<Vec<usize>> {
        let norms: Vec<f64> = vectors.iter().map(|r| norm(*r)).collect();
        let mut group: Vec<usize> = (0..vectors.len()).collect();
        for i in 0..vectors.len() {
            if group[i] != i || !norms[i].is_finite() {
                continue;
            }
            for j in i + 1..vectors.len() {
                if group[j] == j
                    && norms[j].is_finite()
                    && distance(vectors[i], vectors[j]) <= tolerance * norms[i].max(norms[j])
                {
                    group[j] = i;
                }
            }
        }
        (0..vectors.len())
            .map(|leader| (0..vectors.len()).filter(|&k| group[k] == leader).collect())
            .filter(|m: &Vec<usize>| m.len() > 1)
            .collect()
    }

    // The projection window finds every group the pairwise scan finds, and no other: random rows
    // with planted copies at distances just inside and just outside the tolerance, chains whose
    // links are within it but whose ends are not (the greedy order decides), zero rows, rows of
    // very different norms, and a tolerance of ½ and more (every pair compared).
    #[test]
    fn the_window_finds_what_every_pair_finds() {
        let mut rng = plumb_engine::Rng::new(7);
        for trial in 0..40 {
            let (n, len) = (60 + trial, 1 + trial % 9);
            let mut rows: Vec<ndarray::Array1<f64>> = (0..n)
                .map(|_| ndarray::Array1::from_shape_fn(len, |_| rng.normal()))
                .collect();
            for k in 0..n / 3 {
                let (from, to) = (rng.below(n), rng.below(n));
                let tol = [1e-6, 1e-3, 0.3][k % 3];
                // A step of 0.5 to 1.5 times the tolerance, in a random direction.
                let dir = ndarray::Array1::from_shape_fn(len, |_| rng.normal());
                let step = tol * (0.5 + rng.uniform()) * norm(rows[from].view()) / norm(dir.view());
                rows[to] = &rows[from] + &(dir * step);
                if k % 7 == 0 {
                    rows[to] = rows[from].mapv(|v| v * 1e-3);
                }
                if k % 11 == 0 {
                    rows[to].fill(0.0);
                }
            }
            let views: Vec<ArrayView1<f64>> = rows.iter().map(|r| r.view()).collect();
            for tol in [0.0, 1e-6, 1e-3, 0.3, 0.5, 2.0] {
                assert_eq!(
                    equal_groups(&views, tol),
                    pairwise(&views, tol),
                    "trial {trial}, tolerance {tol}"
                );
            }
        }
    }

    // At the boundary: b = (1 − δ)·a lies δ‖a‖ from a, and ‖a‖ is the larger norm, so b counts
    // as equal when δ ≤ τ (by hand); a hair inside is found, a hair beyond is not, as in the
    // pairwise definition.
    #[test]
    fn the_window_keeps_the_boundary() {
        let a = array![3.0, 4.0];
        for tol in [1e-6, 0.25, 0.49] {
            for (scale, found) in [(1.0 - 1e-9, true), (1.0 + 1e-9, false)] {
                let b = a.mapv(|v| v * (1.0 - tol * scale));
                let views = [a.view(), b.view()];
                let groups = equal_groups(&views, tol);
                assert_eq!(groups, pairwise(&views, tol), "{tol} {scale}");
                assert_eq!(groups.len(), usize::from(found), "{tol} {scale}");
            }
        }
    }

    // Units 1, 2 and 3 of layer 1 share their incoming weights and bias; the next layer's columns
    // 1 and 2 are equal, column 3 (unit 3) differs: 1 and 2 are inseparable, 3 only computes the
    // same activation.
    #[test]
    fn outgoing_columns_split_a_group() {
        use plumb_engine::Activation;
        use plumb_engine::graph::{Dense, GraphBuilder, LossConfig, Shape};
        let mut b = GraphBuilder::new(Shape::Flat(1), LossConfig::cross_entropy());
        b.push(None, Activation::Tanh, |s| Dense::new(4, s))
            .unwrap();
        b.push(None, Activation::Softmax, |s| Dense::new(2, s))
            .unwrap();
        let g = b.finish().unwrap();
        let params = [
            array![[0.5], [0.5], [0.5], [-0.3]].into_dyn(),
            array![0.1, 0.1, 0.1, 0.2].into_dyn(),
            array![[0.7, 0.7, -0.4, 0.3], [-0.2, -0.2, 0.9, 0.5]].into_dyn(),
            array![0.0, 0.1].into_dyn(),
        ];
        let groups = crate::graph_symmetry(&g, &params, 1e-6);
        assert_eq!(
            groups,
            vec![SymmetricGroup {
                layer: 1,
                units: vec![1, 2, 3],
                inseparable: vec![vec![1, 2]],
            }]
        );
    }
}
