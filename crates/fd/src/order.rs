//! The one worst-first ordering of checked items. A relative error may be NaN (the quotient could
//! not be formed, or a report read back wrote it as null), so a comparison through `partial_cmp`
//! is not a total order and the standard sort may panic on it; this one is total.

use std::cmp::Ordering;

use crate::check::Status;

/// Larger relative errors first; an unknown one (NaN) before every number, so a coordinate whose
/// error could not be computed is never hidden behind one that merely differs.
pub fn worse_error(a: f64, b: f64) -> Ordering {
    match (a.is_nan(), b.is_nan()) {
        (true, true) => Ordering::Equal,
        (true, false) => Ordering::Less,
        (false, true) => Ordering::Greater,
        (false, false) => b.total_cmp(&a),
    }
}

/// Worst first: by status (mismatch, unreliable, match), then by [`worse_error`]. Sorting with it
/// puts the worst item at index 0; `min_by` picks it.
pub fn worst_first(a: (Status, f64), b: (Status, f64)) -> Ordering {
    b.0.cmp(&a.0).then_with(|| worse_error(a.1, b.1))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A total order even with NaN of either sign: the standard sort checks this and panics
    /// ("does not correctly implement a total order") on a comparison that is not.
    #[test]
    fn nan_errors_sort_without_panic_and_rank_worst_within_their_status() {
        let mut items = Vec::new();
        for i in 0..200 {
            let status = [Status::Match, Status::Unreliable, Status::Mismatch][i % 3];
            let e = match i % 7 {
                0 => f64::NAN,
                1 => -f64::NAN,
                2 => f64::INFINITY,
                _ => (i as f64) * 1e-9,
            };
            items.push((status, e));
        }
        items.sort_by(|a, b| worst_first(*a, *b));
        // Statuses come in blocks, worst first.
        let statuses: Vec<Status> = items.iter().map(|x| x.0).collect();
        assert!(statuses.windows(2).all(|w| w[0] >= w[1]), "{statuses:?}");
        for status in [Status::Mismatch, Status::Unreliable, Status::Match] {
            let errs: Vec<f64> = items
                .iter()
                .filter(|x| x.0 == status)
                .map(|x| x.1)
                .collect();
            let nans = errs.iter().take_while(|e| e.is_nan()).count();
            assert!(nans > 0 && errs[nans..].iter().all(|e| !e.is_nan()));
            assert!(errs[nans..].windows(2).all(|w| w[0] >= w[1]), "{errs:?}");
            assert_eq!(errs[nans], f64::INFINITY);
        }
    }
}
