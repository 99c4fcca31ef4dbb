//! Storage orders (DESIGN §4.3): the axis order of a parameter tensor in a file, as a pure
//! permutation of the canonical order. The engine does no I/O; formats read a tensor in the file's
//! order and call [`Storage::to_canonical`].

use ndarray::{ArrayD, IxDyn};
use thiserror::Error;

/// An axis order spelt with one letter per axis, against a canonical spelling (`oihw` for a conv2d
/// weight, `oik` for a conv1d weight, `oi` for a dense weight: rows are outputs).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Storage {
    letters: String,
    /// File axis a holds canonical axis `perm[a]`.
    perm: Vec<usize>,
}

/// Why a storage order cannot be used.
#[derive(Clone, Debug, PartialEq, Eq, Error)]
pub enum StorageError {
    #[error(
        "storage \"{found}\" is not an order of the letters of \"{canonical}\": use each of {canonical:?}'s letters once, e.g. \"{canonical}\""
    )]
    NotAPermutation { found: String, canonical: String },
}

impl Storage {
    /// Parses `letters` as an order of `canonical`'s letters.
    pub fn parse(letters: &str, canonical: &str) -> Result<Storage, StorageError> {
        let err = || StorageError::NotAPermutation {
            found: letters.to_string(),
            canonical: canonical.to_string(),
        };
        let can: Vec<char> = canonical.chars().collect();
        let found: Vec<char> = letters.chars().collect();
        if found.len() != can.len() {
            return Err(err());
        }
        let mut perm = Vec::with_capacity(can.len());
        for ch in &found {
            let k = can.iter().position(|c| c == ch).ok_or_else(err)?;
            if perm.contains(&k) {
                return Err(err());
            }
            perm.push(k);
        }
        Ok(Storage {
            letters: letters.to_string(),
            perm,
        })
    }

    /// The canonical order itself.
    pub fn canonical(canonical: &str) -> Storage {
        Storage {
            letters: canonical.to_string(),
            perm: (0..canonical.chars().count()).collect(),
        }
    }

    pub fn letters(&self) -> &str {
        &self.letters
    }

    pub fn is_canonical(&self) -> bool {
        self.perm.iter().enumerate().all(|(a, &p)| a == p)
    }

    /// The shape the file holds for a tensor of canonical shape `canonical`.
    pub fn file_shape(&self, canonical: &[usize]) -> Vec<usize> {
        self.perm.iter().map(|&p| canonical[p]).collect()
    }

    /// A tensor in the file's order turned into the canonical order (standard layout).
    pub fn to_canonical<T: Clone>(&self, file: &ArrayD<T>) -> ArrayD<T> {
        let mut inverse = vec![0; self.perm.len()];
        for (a, &p) in self.perm.iter().enumerate() {
            inverse[p] = a;
        }
        standard(file.view().permuted_axes(IxDyn(&inverse)))
    }

    /// A canonical tensor turned into the file's order (standard layout).
    pub fn to_file<T: Clone>(&self, canonical: &ArrayD<T>) -> ArrayD<T> {
        standard(canonical.view().permuted_axes(IxDyn(&self.perm)))
    }
}

fn standard<T: Clone>(view: ndarray::ArrayViewD<T>) -> ArrayD<T> {
    view.as_standard_layout().into_owned()
}

#[cfg(test)]
mod tests {
    use super::*;

    // A hwio tensor's element [h, w, i, o] is the oihw tensor's element [o, i, h, w]: the
    // definition of the order, checked element by element.
    #[test]
    fn hwio_round_trips_and_moves_each_element_where_its_letters_say() {
        let s = Storage::parse("hwio", "oihw").unwrap();
        let can = ArrayD::from_shape_fn(IxDyn(&[2, 3, 4, 5]), |ix| {
            (ix[0] * 1000 + ix[1] * 100 + ix[2] * 10 + ix[3]) as f64
        });
        let file = s.to_file(&can);
        assert_eq!(file.shape(), &s.file_shape(&[2, 3, 4, 5])[..]);
        assert_eq!(file.shape(), &[4, 5, 3, 2]);
        assert_eq!(file[[3, 1, 2, 0]], can[[0, 2, 3, 1]]);
        assert_eq!(s.to_canonical(&file), can);
    }

    #[test]
    fn orders_that_are_not_permutations_are_refused() {
        for bad in ["oih", "oihh", "oixw", "ohwiw"] {
            assert!(Storage::parse(bad, "oihw").is_err(), "{bad}");
        }
        assert!(Storage::parse("kio", "oik").unwrap().file_shape(&[4, 3, 5]) == [5, 3, 4]);
    }
}
