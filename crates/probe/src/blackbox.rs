//! A black box: the program's own tensors, with parameters from a weight file by name or drawn
//! from the seed, and data from a file or drawn from the shapes its hello declares.

use std::collections::HashSet;
use std::path::PathBuf;

use plumb_engine::{Batch, Rng};
use plumb_fd::report::widest_float;
use plumb_formats::Tensor;
use plumb_formats::{read_tensors_for, shape_text};
use plumb_report::{DataSource, WeightsSource};

use crate::{Hello, RunError, TensorSpec};

/// A black box's parameters: from the weight file by name, or drawn from the seed with a 1/√fan-in
/// scale (fan-in: a matrix's last dimension; vectors start at 0.1 scale).
pub(crate) fn blackbox_parameters(
    tensors: &[TensorSpec],
    weights: &Option<PathBuf>,
    seed: u64,
) -> Result<(Vec<Tensor>, WeightsSource), RunError> {
    match weights {
        Some(path) => {
            // Only the tensors the program declares are read; any other is listed.
            let declared: HashSet<&str> = tensors.iter().map(|s| s.name.as_str()).collect();
            let file = read_tensors_for(path, &|name| declared.contains(name))?;
            let source = WeightsSource::File {
                path: path.clone(),
                format: file.format.name().into(),
                dtype: widest_float(&file).into(),
            };
            let named = tensors
                .iter()
                .map(|s| {
                    let Some(t) = file.get(&s.name) else {
                        bail!(
                            "{}: no tensor `{}`, which the program declares",
                            path.display(),
                            s.name
                        );
                    };
                    if t.shape != s.shape {
                        bail!(
                            "{}: tensor `{}` is {}, the program declares {}: save it in the program's shape",
                            path.display(),
                            s.name,
                            shape_text(&t.shape),
                            shape_text(&s.shape)
                        );
                    }
                    Ok(Tensor::new(s.name.clone(), s.shape.clone(), t.data.clone()))
                })
                .collect::<Result<_, RunError>>()?;
            Ok((named, source))
        }
        None => {
            let mut rng = Rng::new(seed ^ 0xb1ac_b0c5);
            let named = tensors
                .iter()
                .map(|s| {
                    let sd = match s.shape.as_slice() {
                        [.., fan_in] if s.shape.len() >= 2 => 1.0 / (*fan_in.max(&1) as f64).sqrt(),
                        _ => 0.1,
                    };
                    Tensor::new(
                        s.name.clone(),
                        s.shape.clone(),
                        (0..s.len()).map(|_| sd * rng.normal()).collect(),
                    )
                })
                .collect();
            Ok((
                named,
                WeightsSource::Init {
                    scheme: "1/√fan-in normal".into(),
                    seed,
                },
            ))
        }
    }
}

/// A black box's data without a description: an `.npz` with `x` (m, inputs) and `y` (m, targets)
/// as it is; a CSV split by the sample shapes the hello declares (`x`, `y`); or, without data, a
/// seeded batch of those shapes (standard-normal x, one-hot rows of y).
pub fn blackbox_batch(
    hello: &Hello,
    data: Option<&std::path::Path>,
    m: usize,
    seed: u64,
) -> Result<(Batch, DataSource), RunError> {
    let flat = |s: &Option<Vec<usize>>| s.as_ref().map(|s| s.iter().product::<usize>());
    let sizes = flat(&hello.x).zip(flat(&hello.y));
    let npz = data.is_some_and(|p| p.extension().is_some_and(|e| e.eq_ignore_ascii_case("npz")));
    if let Some(path) = data {
        let batch = if npz {
            let file = read_tensors_for(path, &|name| ["x", "y"].contains(&name))?;
            let two_d = |name: &str| -> Result<ndarray::Array2<f64>, RunError> {
                let Some(t) = file.get(name) else {
                    bail!(
                        "{}: no array `{name}`; a black box's .npz data holds x (samples, inputs) and y (samples, targets)",
                        path.display()
                    );
                };
                let (rows, cols) = match t.shape.as_slice() {
                    [r, c] => (*r, *c),
                    [r] => (*r, 1),
                    other => bail!(
                        "{}: `{name}` is {}; without a description give it as (samples, values)",
                        path.display(),
                        shape_text(other)
                    ),
                };
                ndarray::Array2::from_shape_vec((rows, cols), t.data.clone())
                    .map_err(|e| RunError::Input(format!("{}: `{name}`: {e}", path.display())))
            };
            let (x, y) = (two_d("x")?, two_d("y")?);
            if x.nrows() != y.nrows() || x.nrows() == 0 {
                bail!(
                    "{}: x has {} samples and y {}: give both the same number, at least one",
                    path.display(),
                    x.nrows(),
                    y.nrows()
                );
            }
            Batch { x, y }
        } else {
            let Some((n, k)) = sizes else {
                bail!(
                    "{}: a CSV file cannot say which columns are inputs without a description: give NET, an .npz with x and y, or have the program declare one sample's \"x\" and \"y\" shapes in its hello (docs/protocol.md)",
                    path.display()
                );
            };
            plumb_formats::read_data(path, n, k)?
        };
        let samples = batch.len();
        return Ok((
            batch,
            DataSource::File {
                path: path.to_path_buf(),
                samples,
            },
        ));
    }
    let Some((n, k)) = sizes else {
        bail!(
            "the program's hello declares no sample shapes (\"x\", \"y\"), so plumb cannot draw data for it: give -d with the data, or NET, or declare them (docs/protocol.md)"
        );
    };
    if m == 0 || m.saturating_mul(n + k) > plumb_formats::MAX_PARAMETERS {
        bail!("--batch {m}: give between 1 and a batch whose values fit in memory");
    }
    let mut rng = Rng::new(seed ^ 0x5eed_da7a);
    let x = ndarray::Array2::from_shape_fn((m, n), |_| rng.normal());
    let mut y = ndarray::Array2::zeros((m, k));
    for mut row in y.rows_mut() {
        row[rng.below(k)] = 1.0;
    }
    Ok((Batch { x, y }, DataSource::Synthetic { samples: m, seed }))
}
