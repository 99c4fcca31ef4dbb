//! Which coordinates a check looks at: all, a seeded sample, or a sample per layer — stratified so
//! that a small tensor such as a layer's bias is never left out.

use std::fmt;

use plumb_engine::Rng;

/// `--sample`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Sample {
    All,
    /// N coordinates over the whole network, spread over the layers by size.
    Total(usize),
    /// N coordinates in every layer (all of a smaller layer).
    PerLayer(usize),
}

/// Networks up to this many parameters are checked in full by default.
pub const FULL_CHECK_LIMIT: usize = 20_000;
/// The default sample per layer above that size.
pub const DEFAULT_PER_LAYER: usize = 1_000;
/// Every stratum (a layer's bias weights, or its other weights) gets at least this many
/// coordinates, or all of them if it has fewer.
pub(crate) const STRATUM_MINIMUM: usize = 10;

impl Sample {
    /// The default for a network of `parameters` parameters: everything up to
    /// [`FULL_CHECK_LIMIT`], else [`DEFAULT_PER_LAYER`] per layer.
    pub fn default_for_parameters(parameters: usize) -> Sample {
        if parameters <= FULL_CHECK_LIMIT {
            Sample::All
        } else {
            Sample::PerLayer(DEFAULT_PER_LAYER)
        }
    }

    /// Parses `all`, `N` or `per-layer:N`.
    pub fn parse(text: &str) -> Result<Sample, String> {
        let count = |s: &str| -> Result<usize, String> {
            match s.trim().parse::<usize>() {
                Ok(0) => Err("the sample size must be at least 1".into()),
                Ok(n) => Ok(n),
                Err(_) => Err(format!("`{s}` is not a whole number")),
            }
        };
        match text.trim() {
            "all" => Ok(Sample::All),
            t => match t.strip_prefix("per-layer:") {
                Some(n) => Ok(Sample::PerLayer(count(n)?)),
                None => count(t).map(Sample::Total).map_err(|e| {
                    format!("{e}; write `all`, a number of coordinates, or `per-layer:N`")
                }),
            },
        }
    }
}

impl fmt::Display for Sample {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Sample::All => f.write_str("all"),
            Sample::Total(n) => write!(f, "{n}"),
            Sample::PerLayer(n) => write!(f, "per-layer:{n}"),
        }
    }
}

/// `--sample N` (`Sample::Total`): exactly N entries in total over groups of `sizes` (layers for
/// `check`, tensors for `probe`). Every group gets `minimum` (or all it has); the rest is shared in
/// proportion to what is left of each group, by largest remainder. When N is smaller than the
/// minimums add up to, each group gets `least` instead, and the total is those.
pub fn share(sizes: &[usize], minimum: usize, least: usize, n: usize) -> Vec<usize> {
    let mut q: Vec<usize> = sizes.iter().map(|&s| s.min(minimum)).collect();
    if q.iter().sum::<usize>() > n {
        q = sizes.iter().map(|&s| s.min(least)).collect();
    }
    let rest = n.saturating_sub(q.iter().sum());
    let room: Vec<usize> = sizes.iter().zip(&q).map(|(&s, &b)| s - b).collect();
    let total_room: usize = room.iter().sum();
    if rest > 0 && total_room > 0 {
        let mut shares: Vec<(usize, usize, usize)> = room
            .iter()
            .enumerate()
            .map(|(i, &r)| (i, rest * r / total_room, rest * r % total_room))
            .collect();
        for &(i, share, _) in &shares {
            q[i] += share;
        }
        let mut left = rest - shares.iter().map(|s| s.1).sum::<usize>();
        shares.sort_by_key(|&(i, _, rem)| (std::cmp::Reverse(rem), i));
        for &(i, _, _) in &shares {
            if left == 0 {
                break;
            }
            if q[i] < sizes[i] {
                q[i] += 1;
                left -= 1;
            }
        }
    }
    q
}

/// The coordinates of a network of parameter tensors to check, as (tensor, flat index) in tensor
/// and flat order; `layers[t]` is the layer tensor `t` belongs to. The sample means what it means
/// for every checker: `Total(n)` checks exactly n coordinates over the network (each tensor at least
/// 10 of them, or all of a smaller one, unless n is too small for that: then one per tensor), the
/// rest spread by size; `PerLayer(n)` n per layer (all of a smaller layer), spread over the
/// layer's tensors the same way; every tensor is a stratum, so a bias is never left out.
pub fn select_tensors(
    sizes: &[usize],
    layers: &[usize],
    sample: Sample,
    seed: u64,
) -> Result<Vec<(usize, usize)>, String> {
    let total: usize = sizes.iter().sum();
    let quotas: Vec<usize> = match sample {
        Sample::All => sizes.to_vec(),
        Sample::Total(n) if n > total => {
            return Err(format!(
                "--sample {n} is more than the network's {total} parameters; use `all` or a smaller number"
            ));
        }
        Sample::Total(n) => spread(sizes, n),
        Sample::PerLayer(n) => {
            let mut q = vec![0; sizes.len()];
            // Each layer's tensors, found in one pass (not a scan of every tensor per layer).
            let mut of_layer: std::collections::BTreeMap<usize, Vec<usize>> = Default::default();
            for (t, &layer) in layers.iter().enumerate() {
                of_layer.entry(layer).or_default().push(t);
            }
            for members in of_layer.into_values() {
                let own: Vec<usize> = members.iter().map(|&t| sizes[t]).collect();
                let n = n.min(own.iter().sum());
                for (&t, share) in members.iter().zip(spread(&own, n)) {
                    q[t] = share;
                }
            }
            q
        }
    };
    let mut rng = Rng::new(seed ^ 0x0f1a7);
    let mut out = Vec::new();
    for (t, (&size, &q)) in sizes.iter().zip(&quotas).enumerate() {
        let mut idx: Vec<usize> = if q >= size {
            (0..size).collect()
        } else {
            pick(size, &mut rng, q)
        };
        idx.sort_unstable();
        out.extend(idx.into_iter().map(|k| (t, k)));
    }
    Ok(out)
}

/// Makes a sample of (tensor, flat index) pairs, sorted as [`select_tensors`] gives them, reach
/// every block of each tensor its share can (`blocks(t)` blocks, `block(t, k)` the block of
/// index k: an lstm's gate blocks, an attention projection's heads): a block left out takes the
/// place of a coordinate of the tensor's fullest block, so the count stays the one asked for.
/// Seeded; a tensor sampled whole, or of one block, is left as it is.
pub fn cover_blocks(
    picked: &mut [(usize, usize)],
    sizes: &[usize],
    blocks: impl Fn(usize) -> usize,
    block: impl Fn(usize, usize) -> usize,
    seed: u64,
) {
    let mut rng = Rng::new(seed ^ 0xb10c);
    let mut start = 0;
    while start < picked.len() {
        let t = picked[start].0;
        let end = start + picked[start..].iter().take_while(|p| p.0 == t).count();
        let n = blocks(t);
        if n > 1 && end - start < sizes[t] {
            let mut members: Vec<Vec<usize>> = vec![Vec::new(); n];
            for &(_, k) in &picked[start..end] {
                members[block(t, k)].push(k);
            }
            for b in 0..n {
                if !members[b].is_empty() {
                    continue;
                }
                let fullest = (0..n).max_by_key(|&c| (members[c].len(), c)).unwrap();
                if members[fullest].len() < 2 {
                    break; // fewer coordinates than blocks: nothing to move
                }
                let own: Vec<usize> = (0..sizes[t]).filter(|&k| block(t, k) == b).collect();
                let drop = rng.below(members[fullest].len());
                members[fullest].remove(drop);
                members[b].push(own[rng.below(own.len())]);
            }
            let mut all: Vec<usize> = members.into_iter().flatten().collect();
            all.sort_unstable();
            for (slot, k) in picked[start..end].iter_mut().zip(all) {
                slot.1 = k;
            }
        }
        start = end;
    }
}

/// n coordinates shared over strata of the given sizes: each its minimum (see [`select_tensors`]),
/// the rest in proportion to what is left of each, by largest remainder.
fn spread(sizes: &[usize], n: usize) -> Vec<usize> {
    share(sizes, STRATUM_MINIMUM, 1, n)
}

/// k distinct indices of 0..n, seeded (partial Fisher–Yates over a sparse map, so picking a few
/// coordinates of a huge layer costs no more than the few).
pub(crate) fn pick(n: usize, rng: &mut Rng, k: usize) -> Vec<usize> {
    use std::collections::HashMap;
    let mut swapped: HashMap<usize, usize> = HashMap::new();
    let mut out = Vec::with_capacity(k);
    for i in 0..k.min(n) {
        let j = i + rng.below(n - i);
        let vi = *swapped.get(&i).unwrap_or(&i);
        let vj = *swapped.get(&j).unwrap_or(&j);
        swapped.insert(j, vi);
        out.push(vj);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `--sample 15` is 15 coordinates in `check` (over the graph's tensors) and in `probe` (over
    /// the program's tensors): one meaning, however the groups are cut.
    #[test]
    fn a_total_sample_is_that_many_in_check_and_probe() {
        // A 4-5-3 dense network: weights 5 × 4 and 3 × 5 with their biases, or augmented.
        let augmented = [25, 18];
        let split = [20, 5, 15, 3];
        for total in [1, 2, 4, 15, 30, 43] {
            assert_eq!(
                select_tensors(&split, &[0, 0, 1, 1], Sample::Total(total), 3)
                    .unwrap()
                    .len(),
                total.max(4)
            );
            assert_eq!(
                crate::select_flat(&augmented, Sample::Total(total), 3).len(),
                total.max(2)
            );
            assert_eq!(
                crate::select_flat(&split, Sample::Total(total), 3).len(),
                total.max(4)
            );
        }
    }

    #[test]
    fn tensor_samples_mean_what_dense_samples_mean() {
        // Three layers: conv weight 3·2·5 and bias 3, a parameterless pool, dense 4·12 and 4.
        let sizes = [30, 3, 48, 4];
        let layers = [0, 0, 2, 2];
        let all = select_tensors(&sizes, &layers, Sample::All, 1).unwrap();
        assert_eq!(all.len(), 85);
        let n = select_tensors(&sizes, &layers, Sample::Total(40), 3).unwrap();
        assert_eq!(n.len(), 40, "exactly N");
        assert_eq!(
            n,
            select_tensors(&sizes, &layers, Sample::Total(40), 3).unwrap()
        );
        assert_ne!(
            n,
            select_tensors(&sizes, &layers, Sample::Total(40), 4).unwrap()
        );
        for (t, size) in sizes.iter().enumerate() {
            let got = n.iter().filter(|c| c.0 == t).count();
            assert!(got >= (*size).min(10), "tensor {t}: {got}");
        }
        let mut d = n.clone();
        d.dedup();
        assert_eq!(d.len(), n.len(), "distinct");
        // Too few for ten each: one per tensor at least, still exactly N.
        let few = select_tensors(&sizes, &layers, Sample::Total(6), 3).unwrap();
        assert_eq!(few.len(), 6);
        assert!((0..4).all(|t| few.iter().any(|c| c.0 == t)));
        // Per layer: 20 of conv's 33 (its 3 biases all), 20 of dense's 52.
        let per = select_tensors(&sizes, &layers, Sample::PerLayer(20), 5).unwrap();
        assert_eq!(per.iter().filter(|c| c.0 < 2).count(), 20);
        assert_eq!(per.iter().filter(|c| c.0 >= 2).count(), 20);
        assert_eq!(per.iter().filter(|c| c.0 == 1).count(), 3);
        assert_eq!(per.iter().filter(|c| c.0 == 3).count(), 4);
        let big = select_tensors(&sizes, &layers, Sample::PerLayer(500), 5).unwrap();
        assert_eq!(big, all);
        assert!(select_tensors(&sizes, &layers, Sample::Total(86), 1).is_err());
    }

    #[test]
    fn parsing() {
        assert_eq!(Sample::parse("all"), Ok(Sample::All));
        assert_eq!(Sample::parse("250"), Ok(Sample::Total(250)));
        assert_eq!(Sample::parse("per-layer:40"), Ok(Sample::PerLayer(40)));
        assert!(Sample::parse("0").is_err());
        assert!(Sample::parse("per-layer:x").is_err());
        assert!(Sample::parse("some").is_err());
    }
}
