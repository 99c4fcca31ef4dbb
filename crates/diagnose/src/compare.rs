//! One outside tensor against the reference: how far apart, how aligned, and where it is worst.

use plumb_formats::Tensor;

/// The figures of one outside tensor against the reference (same shape).
#[derive(Clone, Debug, PartialEq)]
pub struct TensorComparison {
    pub max_rel_error: f64,
    pub median_rel_error: f64,
    /// cos ∠(outside, reference); 1 when both are zero.
    pub cosine: f64,
    /// The least-squares factor s minimising ‖outside − s·reference‖.
    pub scale: f64,
    /// Flat index of the largest relative error, with the two values there.
    pub worst: usize,
    pub worst_outside: f64,
    pub worst_reference: f64,
    /// Every entry within `tolerance` (relative, with the floor).
    pub matches: bool,
    /// Every entry's relative error, in the tensor's C order (for plots).
    pub rel_errors: Vec<f64>,
}

/// Compares two tensors of the same shape. `tolerance` is the largest relative error that counts as
/// agreement; `floor` the least denominator of a relative error (`plumb_fd::relative_floor`: the
/// tensor's scale, or the network's for a tensor that is zero or tiny).
pub fn compare_tensor(
    outside: &Tensor,
    reference: &Tensor,
    tolerance: f64,
    floor: f64,
) -> TensorComparison {
    assert_eq!(
        outside.shape, reference.shape,
        "compare tensors of the same shape"
    );
    let mut rel: Vec<f64> = Vec::with_capacity(outside.data.len());
    let (mut dot, mut uu, mut rr) = (0.0, 0.0, 0.0);
    for (&u, &r) in outside.data.iter().zip(&reference.data) {
        let den = u.abs().max(r.abs()).max(floor);
        rel.push(if den > 0.0 { (u - r).abs() / den } else { 0.0 });
        dot += u * r;
        uu += u * u;
        rr += r * r;
    }
    let (worst, max_rel) = rel
        .iter()
        .copied()
        .enumerate()
        .fold((0, 0.0f64), |(bi, bv), (i, v)| {
            if v > bv || v.is_nan() {
                (i, v)
            } else {
                (bi, bv)
            }
        });
    let mut sorted = rel.clone();
    sorted.sort_by(f64::total_cmp);
    let n = sorted.len();
    let median = match n {
        0 => 0.0,
        _ if n % 2 == 1 => sorted[n / 2],
        _ => 0.5 * (sorted[n / 2 - 1] + sorted[n / 2]),
    };
    let cosine = if uu == 0.0 && rr == 0.0 {
        1.0
    } else if uu == 0.0 || rr == 0.0 {
        0.0
    } else {
        dot / (uu.sqrt() * rr.sqrt())
    };
    TensorComparison {
        max_rel_error: max_rel,
        median_rel_error: median,
        cosine,
        scale: if rr > 0.0 { dot / rr } else { 0.0 },
        worst,
        worst_outside: outside.data.get(worst).copied().unwrap_or(0.0),
        worst_reference: reference.data.get(worst).copied().unwrap_or(0.0),
        matches: max_rel <= tolerance && outside.data.iter().all(|v| v.is_finite()),
        rel_errors: rel,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn figures_of_a_scaled_copy() {
        let r = Tensor::new("t", vec![3], vec![1.0, 2.0, -3.0]);
        let u = Tensor::new("t", vec![3], vec![2.0, 4.0, -6.0]);
        let c = compare_tensor(&u, &r, 1e-6, 0.3);
        assert!((c.scale - 2.0).abs() < 1e-15);
        assert!((c.cosine - 1.0).abs() < 1e-15);
        // |6 − 3| / max(6, 3, 0.3) = 0.5 at the largest entry, likewise elsewhere.
        assert!((c.max_rel_error - 0.5).abs() < 1e-15);
        assert!(!c.matches);
        assert!(compare_tensor(&r, &r, 0.0, 0.3).matches);
    }

    #[test]
    fn transposition_and_indices() {
        let t = Tensor::new("t", vec![2, 3], vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
        let tt = t.transposed();
        assert_eq!(tt.shape, [3, 2]);
        assert_eq!(tt.data, [0.0, 3.0, 1.0, 4.0, 2.0, 5.0]);
        assert_eq!(t.index_of(4), [1, 1]);
    }
}
