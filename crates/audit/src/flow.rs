//! Signal and gradient flow on the probe batch: how spread each layer's activations are, how large
//! its gradient is, and the largest singular value of its weight matrix (by Lanczos bidiagonalisation), so
//! that a gradient that shrinks or grows by orders of magnitude across the layers is seen.

use ndarray::ArrayView2;
use plumb_engine::Rng;

use crate::robust::largest;
use serde::Serialize;

#[derive(Clone, Debug, Serialize)]
pub struct LayerFlow {
    pub layer: usize,
    /// Standard deviation of the layer's activations over the batch and its units.
    pub activation_std: f64,
    /// ‖∂J/∂(W, b)‖₂ over the layer, and that divided by √(parameters).
    pub gradient_norm: f64,
    pub gradient_rms: f64,
    /// Largest singular value of the weight matrix (bias column left out).
    pub sigma_max: f64,
}

/// The residual, relative to the estimate, at which the bidiagonalisation stops: a singular value
/// of W then lies within 10⁻⁷ of the estimate. That is what the figure needs: it is shown to four
/// digits, and a baseline holds it to a relative change of 10⁻⁶ (`plumb_report::baseline`), so an
/// estimate a tenth of that from one recorded at a tighter stop reads as the same figure. The
/// change between two steps is no such bound: near a cluster of singular values the estimate can
/// stall for a few steps and then rise again.
const SIGMA_TOLERANCE: f64 = 1e-7;

/// The most steps the bidiagonalisation takes: the matrix's smaller side, or this.
const SIGMA_STEPS: usize = 300;

/// The largest singular value of W by Golub–Kahan–Lanczos bidiagonalisation (Golub & Kahan 1965)
/// from a seeded start, with every new vector reorthogonalised against the earlier ones: after k
/// steps WVₖ = UₖBₖ with Bₖ upper bidiagonal, and Bₖ's largest singular value approaches σ₁ from
/// below. Plain power iteration converges at the rate (σ₂/σ₁)² per step, which for a wide random
/// layer (whose top singular values crowd together) needs thousands of steps; the Krylov space
/// finds σ₁ in tens. W is divided by its largest |entry| first so that no product overflows.
pub fn sigma_max(w: ArrayView2<f64>, rng: &mut Rng) -> f64 {
    let scale = largest(w.iter().copied());
    if scale == 0.0 {
        return 0.0;
    }
    // Run from the smaller side (Wᵀ has W's singular values): the Krylov space then lies in the
    // row space, and after min(m, n) steps it is the whole of it.
    let w = if w.nrows() < w.ncols() {
        w.t().as_standard_layout().mapv(|x| x / scale)
    } else {
        w.mapv(|x| x / scale)
    };
    let (m, n) = w.dim();
    let steps = m.min(n).min(SIGMA_STEPS);
    let mut us: Vec<Vec<f64>> = Vec::with_capacity(steps);
    let mut vs: Vec<Vec<f64>> = Vec::with_capacity(steps + 1);
    let mut v: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
    if normalise(&mut v) == 0.0 {
        return 0.0;
    }
    // αⱼ on Bₖ's diagonal, βⱼ₊₁ above it.
    let (mut alpha, mut beta) = (Vec::with_capacity(steps), Vec::with_capacity(steps));
    let mut sigma = 0.0;
    for j in 0..steps {
        // u = W v − β u₋, as a dot product per row (W read in its own order).
        let mut u: Vec<f64> = w.rows().into_iter().map(|row| dot(row, &v)).collect();
        if let (Some(prev), Some(&b)) = (us.last(), beta.last()) {
            u.iter_mut()
                .zip(prev)
                .for_each(|(x, p): (&mut f64, &f64)| *x -= b * p);
        }
        reorthogonalise(&mut u, &us);
        let a = normalise(&mut u);
        vs.push(std::mem::take(&mut v));
        alpha.push(a);
        if a == 0.0 {
            // W v lies in the span of the earlier u: the space closed, and Bₖ (with this zero
            // on its diagonal) holds W's values.
            return largest_singular_value(&alpha, &beta).0 * scale;
        }
        // v = Wᵀ u − α v₋, as a sum of rows.
        let mut next = vec![0.0; n];
        for (&ui, row) in u.iter().zip(w.rows()) {
            next.iter_mut()
                .zip(row.iter())
                .for_each(|(x, r)| *x += ui * r);
        }
        next.iter_mut().zip(&vs[j]).for_each(|(x, p)| *x -= a * p);
        us.push(u);
        reorthogonalise(&mut next, &vs);
        let b = normalise(&mut next);
        // With Bₖ's top singular triplet (θ, p, q), W Vₖq = θ Uₖp exactly and Wᵀ Uₖp = θ Vₖq
        // + β αₖ qₖ/θ · v: some singular value of W lies within that residual of θ, and θ ≤ σ₁.
        let (theta, q_last) = largest_singular_value(&alpha, &beta);
        sigma = theta;
        let residual = if theta > 0.0 {
            b * a * q_last / theta
        } else {
            0.0
        };
        // β = 0: the Krylov space holds an invariant subspace, and Bₖ's values are W's.
        if residual <= SIGMA_TOLERANCE * theta || b == 0.0 {
            return sigma * scale;
        }
        beta.push(b);
        v = next;
    }
    sigma * scale
}

/// Σ row·v, in four running sums (so that the compiler can keep them in vector registers).
fn dot(row: ndarray::ArrayView1<f64>, v: &[f64]) -> f64 {
    match row.as_slice() {
        Some(r) => {
            let mut acc = [0.0; 4];
            let (rc, vc) = (r.chunks_exact(4), v.chunks_exact(4));
            let tail: f64 = rc
                .remainder()
                .iter()
                .zip(vc.remainder())
                .map(|(a, b)| a * b)
                .sum();
            for (a, b) in rc.zip(vc) {
                for k in 0..4 {
                    acc[k] += a[k] * b[k];
                }
            }
            acc.iter().sum::<f64>() + tail
        }
        None => row.iter().zip(v).map(|(a, b)| a * b).sum(),
    }
}

/// Divides x by its norm, which it returns (0 leaves x as it is).
fn normalise(x: &mut [f64]) -> f64 {
    let n = x.iter().map(|v| v * v).sum::<f64>().sqrt();
    if n > 0.0 {
        x.iter_mut().for_each(|v| *v /= n);
    }
    n
}

/// Removes from x its components along the orthonormal vectors `basis` (twice: one pass of
/// Gram–Schmidt leaves round-off along them that the next steps would amplify).
fn reorthogonalise(x: &mut [f64], basis: &[Vec<f64>]) {
    for _ in 0..2 {
        for q in basis {
            let c: f64 = x.iter().zip(q).map(|(a, b)| a * b).sum();
            x.iter_mut().zip(q).for_each(|(a, b)| *a -= c * b);
        }
    }
}

/// The largest singular value of the upper bidiagonal B with `alpha` on its diagonal and `beta`
/// above it (`beta` as long as `alpha` or one shorter), and the last entry (in magnitude) of its
/// right singular vector: the square root of the largest eigenvalue of the tridiagonal BᵀB, by
/// bisection on Sturm counts (the number of eigenvalues below x is the number of negative pivots
/// of BᵀB − x), and that eigenvalue's eigenvector by inverse iteration.
fn largest_singular_value(alpha: &[f64], beta: &[f64]) -> (f64, f64) {
    let k = alpha.len();
    // BᵀB: diagonal αᵢ² + βᵢ² (βᵢ the entry above αᵢ, none for i = 0), off-diagonal αᵢβᵢ₊₁.
    let diag: Vec<f64> = (0..k)
        .map(|i| {
            alpha[i] * alpha[i]
                + if i > 0 {
                    beta[i - 1] * beta[i - 1]
                } else {
                    0.0
                }
        })
        .collect();
    let off: Vec<f64> = (0..k.saturating_sub(1))
        .map(|i| alpha[i] * beta[i])
        .collect();
    let below = |x: f64| {
        let mut count = 0;
        let mut d = 1.0;
        for i in 0..k {
            let e2 = if i > 0 { off[i - 1] * off[i - 1] } else { 0.0 };
            d = diag[i] - x - if i > 0 { e2 / d } else { 0.0 };
            if d == 0.0 {
                d = -f64::EPSILON * (diag[i].abs() + x.abs()).max(f64::MIN_POSITIVE);
            }
            if d < 0.0 {
                count += 1;
            }
        }
        count
    };
    // Every eigenvalue lies in [0, the largest Gershgorin row bound].
    let mut hi = (0..k)
        .map(|i| {
            diag[i]
                + if i > 0 { off[i - 1].abs() } else { 0.0 }
                + off.get(i).map_or(0.0, |e| e.abs())
        })
        .fold(0.0, f64::max);
    let mut lo = 0.0;
    // The largest eigenvalue is the x at which the count of eigenvalues below reaches k.
    while hi - lo > 4.0 * f64::EPSILON * hi {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if below(mid) == k {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    (hi.sqrt(), last_of_eigenvector(&diag, &off, hi))
}

/// |qₖ| of the unit eigenvector q of the symmetric tridiagonal T (`diag`, `off`) for its
/// eigenvalue λ, by two steps of inverse iteration: solving (T − μ)x = b with μ a hair above λ
/// (by the tridiagonal elimination, a zero pivot nudged) multiplies q's share of b by 1/(μ − λ).
fn last_of_eigenvector(diag: &[f64], off: &[f64], lambda: f64) -> f64 {
    let k = diag.len();
    let mu = lambda * (1.0 + 64.0 * f64::EPSILON) + f64::MIN_POSITIVE;
    let tiny = f64::EPSILON * lambda.abs().max(f64::MIN_POSITIVE);
    let mut x = vec![1.0; k];
    for _ in 0..2 {
        let mut c = vec![0.0; k];
        let mut y = vec![0.0; k];
        for i in 0..k {
            let mut pivot = diag[i] - mu;
            let mut rhs = x[i];
            if i > 0 {
                pivot -= off[i - 1] * c[i - 1];
                rhs -= off[i - 1] * y[i - 1];
            }
            if pivot.abs() < tiny {
                pivot = tiny;
            }
            c[i] = off.get(i).map_or(0.0, |e| e / pivot);
            y[i] = rhs / pivot;
        }
        for i in (0..k.saturating_sub(1)).rev() {
            y[i] -= c[i] * y[i + 1];
        }
        let n = y.iter().map(|v| v * v).sum::<f64>().sqrt();
        if !(n.is_finite() && n > 0.0) {
            return 1.0;
        }
        x = y.iter().map(|v| v / n).collect();
    }
    x[k - 1].abs()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    // By hand: diag(3, 1) has singular values 3 and 1; [[1, 1], [1, 1]] has 2 and 0.
    #[test]
    fn finds_the_largest_singular_value_of_small_matrices() {
        let mut rng = Rng::new(1);
        assert!((sigma_max(array![[3.0, 0.0], [0.0, 1.0]].view(), &mut rng) - 3.0).abs() < 1e-9);
        assert!((sigma_max(array![[1.0, 1.0], [1.0, 1.0]].view(), &mut rng) - 2.0).abs() < 1e-9);
        assert_eq!(sigma_max(array![[0.0, 0.0]].view(), &mut rng), 0.0);
        // Entries whose squares overflow: diag(3e300, 1e300) has singular value 3e300.
        let s = sigma_max(array![[3e300, 0.0], [0.0, 1e300]].view(), &mut rng);
        assert!((s / 3e300 - 1.0).abs() < 1e-9, "{s}");
    }

    /// Q₁ diag(s) Q₂ᵀ with Q₁, Q₂ orthogonal (Householder reflections I − 2hhᵀ/‖h‖²) has the
    /// singular values s, by the SVD's own definition. With the top values crowded (1, 1 − 10⁻⁴,
    /// 1 − 2·10⁻⁴, …) power iteration would need some 10⁵ steps for ten digits; the
    /// bidiagonalisation finds σ₁ = 1 within 1e-9, on a tall and on a wide matrix.
    #[test]
    fn crowded_top_singular_values_are_resolved() {
        let reflect = |dim: usize, seed: u64| {
            let mut rng = Rng::new(seed);
            let h: Vec<f64> = (0..dim).map(|_| rng.normal()).collect();
            let hh: f64 = h.iter().map(|x| x * x).sum();
            ndarray::Array2::from_shape_fn((dim, dim), |(i, j)| {
                f64::from(u8::from(i == j)) - 2.0 * h[i] * h[j] / hh
            })
        };
        for (m, n) in [(120, 80), (80, 120), (10, 1024)] {
            let k = m.min(n);
            let d = ndarray::Array2::from_shape_fn((m, n), |(i, j)| {
                if i == j { 1.0 - 1e-4 * i as f64 } else { 0.0 }
            });
            let w = reflect(m, 3).dot(&d).dot(&reflect(n, 4).t());
            let mut rng = Rng::new(5);
            let s = sigma_max(w.view(), &mut rng);
            assert!((s - 1.0).abs() < 1e-9, "{m} × {n} ({k} values): {s}");
            // Scaled by 7: the figure scales with W.
            let s7 = sigma_max((&w * 7.0).view(), &mut rng);
            assert!((s7 / 7.0 - 1.0).abs() < 1e-9, "{s7}");
        }
    }

    /// A matrix of rank one, u vᵀ, has the one singular value ‖u‖‖v‖ (the Krylov space closes
    /// after one step).
    #[test]
    fn rank_one_closes_at_once() {
        let u = ndarray::Array1::from_iter((0..50).map(|i| (i as f64 * 0.37).sin()));
        let v = ndarray::Array1::from_iter((0..30).map(|i| 1.0 + (i as f64).cos()));
        let w = ndarray::Array2::from_shape_fn((50, 30), |(i, j)| u[i] * v[j]);
        let want = u.dot(&u).sqrt() * v.dot(&v).sqrt();
        let s = sigma_max(w.view(), &mut Rng::new(2));
        assert!((s / want - 1.0).abs() < 1e-12, "{s} vs {want}");
    }
}
