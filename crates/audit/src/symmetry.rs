//! Units that cannot be told apart. Units with identical incoming weights (bias included) compute
//! the same activation on every input. When their outgoing weights are identical too, they also
//! receive the same gradient, so gradient descent keeps them identical for ever (Goodfellow, Bengio &
//! Courville, Deep Learning §8.4: equal weights do not break symmetry); when their outgoing weights
//! differ, their gradients differ and training can still separate them.

use ndarray::ArrayView1;
use plumb_engine::Weights;

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

/// Groups of units with identical incoming rows, each split by its outgoing columns.
pub fn symmetry(weights: &Weights<f64>, tolerance: f64) -> Vec<SymmetricGroup> {
    let layers = weights.layers();
    let mut out = Vec::new();
    for (l, groups) in symmetric_groups(weights, tolerance).into_iter().enumerate() {
        for g in groups {
            let inseparable = match layers.get(l + 1) {
                // Unit u of layer l is multiplied by column u + 1 of layer l + 1 (column 0: the bias).
                Some(next) => {
                    let cols: Vec<ArrayView1<f64>> =
                        g.iter().map(|&u| next.column(u + 1)).collect();
                    equal_groups(&cols, tolerance)
                        .into_iter()
                        .map(|sub| sub.into_iter().map(|k| g[k] + 1).collect())
                        .collect()
                }
                None => Vec::new(),
            };
            out.push(SymmetricGroup {
                layer: l + 1,
                units: g.iter().map(|u| u + 1).collect(),
                inseparable,
            });
        }
    }
    out
}

/// Groups of (0-based) units with equal incoming rows, per layer: rows i and j are equal when
/// ‖rᵢ − rⱼ‖ ≤ tolerance · max(‖rᵢ‖, ‖rⱼ‖) (and both zero counts as equal).
pub fn symmetric_groups(weights: &Weights<f64>, tolerance: f64) -> Vec<Vec<Vec<usize>>> {
    weights
        .layers()
        .iter()
        .map(|theta| {
            let rows: Vec<ArrayView1<f64>> = theta.rows().into_iter().collect();
            equal_groups(&rows, tolerance)
        })
        .collect()
}

/// Groups (indices into `vectors`, two or more each) of vectors equal to the relative tolerance.
pub(crate) fn equal_groups(vectors: &[ArrayView1<f64>], tolerance: f64) -> Vec<Vec<usize>> {
    let norms: Vec<f64> = vectors
        .iter()
        .map(|r| r.iter().map(|v| v * v).sum::<f64>().sqrt())
        .collect();
    // A vector with a non-finite value or norm has its own finding and is no evidence of symmetry.
    let usable: Vec<bool> = norms.iter().map(|n| n.is_finite()).collect();
    let mut group: Vec<usize> = (0..vectors.len()).collect();
    for i in 0..vectors.len() {
        if group[i] != i || !usable[i] {
            continue;
        }
        for j in i + 1..vectors.len() {
            if group[j] != j || !usable[j] {
                continue;
            }
            let d = vectors[i]
                .iter()
                .zip(vectors[j].iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f64>()
                .sqrt();
            if d <= tolerance * norms[i].max(norms[j]) {
                group[j] = i;
            }
        }
    }
    let mut out: Vec<Vec<usize>> = Vec::new();
    for leader in 0..vectors.len() {
        let members: Vec<usize> = (0..vectors.len()).filter(|&k| group[k] == leader).collect();
        if members.len() > 1 {
            out.push(members);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn finds_equal_and_nearly_equal_rows_only() {
        let w = Weights::new(vec![array![
            [0.1, 0.5, -0.2],
            [0.3, 0.1, 0.9],
            [0.1, 0.5, -0.2 + 1e-9],
            [0.1, 0.5, -0.21],
        ]]);
        assert_eq!(symmetric_groups(&w, 1e-6), vec![vec![vec![0, 2]]]);
        assert_eq!(symmetric_groups(&w, 1e-12), vec![Vec::<Vec<usize>>::new()]);
        // Rows whose norm is infinite (an Inf, or squares that overflow) match nothing.
        let w = Weights::new(vec![array![
            [f64::INFINITY, 1.0],
            [1.0, f64::INFINITY],
            [1e300, 1e300],
            [-1e300, 1e300]
        ]]);
        assert_eq!(symmetric_groups(&w, 1e-6), vec![Vec::<Vec<usize>>::new()]);
    }

    // Units 1 and 2 of layer 1 share their incoming rows; the next layer's columns 1 and 2 (after
    // the bias column) are equal, column 3 (unit 3, also a copy) differs: 1 and 2 are inseparable,
    // 3 only computes the same activation.
    #[test]
    fn outgoing_columns_split_a_group() {
        let w = Weights::new(vec![
            array![[0.1, 0.5], [0.1, 0.5], [0.1, 0.5], [0.2, -0.3]],
            array![[0.0, 0.7, 0.7, -0.4, 0.3], [0.1, -0.2, -0.2, 0.9, 0.5]],
        ]);
        let groups = symmetry(&w, 1e-6);
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
