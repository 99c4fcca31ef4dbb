//! The floor under the relative error's denominator: one rule for `check`, `compare` and `probe`
//! (DESIGN §6).
//!
//! A relative error |a − n| / max(|a|, |n|, floor) judges each entry against its tensor's (or
//! layer's) scale: round-off leaves every entry of a tensor an absolute error of about the same
//! size, so entries near zero are not held to their own tiny magnitude. A tensor whose reference
//! gradient is itself zero or tiny (an output bias at a balanced optimum, an attention key bias
//! that softmax's shift invariance makes exactly zero) would still be held to round-off of its own
//! size: there the network's gradient scale takes over. A difference within [`ROUND_OFF`] ε of the
//! network's largest gradient entry is never called a mismatch.

/// The floor as a fraction of the tensor's (or layer's) largest |entry|.
pub const FLOOR: f64 = 0.1;

/// Round-off, in units of ε of the network's largest |gradient entry|, that any entry may carry:
/// an entry sums products over the batch and the units, each rounded.
pub const ROUND_OFF: f64 = 100.0;

/// The floor for a tensor whose largest |entry| is `own`, in a network whose largest |entry| is
/// `network`, at machine epsilon `eps` and relative tolerance `tolerance`: the larger of
/// [`FLOOR`]·own and the denominator at which a difference of [`ROUND_OFF`]·ε·network reaches the
/// tolerance.
pub fn relative_floor(own: f64, network: f64, eps: f64, tolerance: f64) -> f64 {
    let network_floor = if tolerance > 0.0 {
        ROUND_OFF * eps * network / tolerance
    } else {
        0.0
    };
    (FLOOR * own).max(network_floor)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_tensor_of_the_networks_scale_keeps_its_own_floor() {
        // f64, tolerance 1e-6: the network part is 100·2.2e-16/1e-6 ≈ 2.2e-8 of the scale.
        assert_eq!(relative_floor(1.0, 1.0, f64::EPSILON, 1e-6), 0.1);
        let tiny = relative_floor(1e-12, 1.0, f64::EPSILON, 1e-6);
        assert!((tiny - 100.0 * f64::EPSILON / 1e-6).abs() < 1e-20);
        // A difference of 100 ε of the network's scale is exactly at the tolerance.
        assert!((100.0 * f64::EPSILON / tiny - 1e-6).abs() < 1e-18);
    }
}
