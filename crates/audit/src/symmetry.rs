//! Units that cannot be told apart: a layer whose units have identical incoming weights (bias
//! included) computes the same value in each, receives the same gradient, and so they never differ
//! (Goodfellow, Bengio & Courville, Deep Learning §8.4: equal weights do not break symmetry).

use plumb_engine::Weights;

/// Groups of (0-based) units with equal incoming rows, per layer: rows i and j are equal when
/// ‖rᵢ − rⱼ‖ ≤ tolerance · max(‖rᵢ‖, ‖rⱼ‖) (and both zero counts as equal).
pub fn symmetric_groups(weights: &Weights<f64>, tolerance: f64) -> Vec<Vec<Vec<usize>>> {
    weights
        .layers()
        .iter()
        .map(|theta| {
            let rows: Vec<Vec<f64>> = theta.rows().into_iter().map(|r| r.to_vec()).collect();
            let norms: Vec<f64> = rows
                .iter()
                .map(|r| r.iter().map(|v| v * v).sum::<f64>().sqrt())
                .collect();
            // A row with a non-finite value or norm has its own finding and is no evidence of symmetry.
            let usable: Vec<bool> = norms.iter().map(|n| n.is_finite()).collect();
            let mut group: Vec<usize> = (0..rows.len()).collect();
            for i in 0..rows.len() {
                if group[i] != i || !usable[i] {
                    continue;
                }
                for j in i + 1..rows.len() {
                    if group[j] != j || !usable[j] {
                        continue;
                    }
                    let d = rows[i]
                        .iter()
                        .zip(&rows[j])
                        .map(|(a, b)| (a - b) * (a - b))
                        .sum::<f64>()
                        .sqrt();
                    if d <= tolerance * norms[i].max(norms[j]) {
                        group[j] = i;
                    }
                }
            }
            let mut out: Vec<Vec<usize>> = Vec::new();
            for leader in 0..rows.len() {
                let members: Vec<usize> = (0..rows.len()).filter(|&k| group[k] == leader).collect();
                if members.len() > 1 {
                    out.push(members);
                }
            }
            out
        })
        .collect()
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
}
