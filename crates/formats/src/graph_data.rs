//! Data files for the layer graph: x of any input shape and y of any output shape, as DESIGN §5
//! describes them, turned into a batch whose rows are in C order of the engine's shapes.
//!
//! An `.npz` holds `x` as (m, *input): (m, features), (m, channels, length), (m, channels, height,
//! width), (m, steps, features), or integer token ids (m, steps) of any integer dtype. With
//! [`AxisOrder::ChannelsLast`] (`--channels-last`) a spatial x is (m, length, channels) or (m,
//! height, width, channels) and is permuted on reading; so is y when the output is spatial. `y`
//! holds targets of the output's shape, or integer class labels — (m,) for a vector of classes,
//! (m, steps) for a per-step output — which are one-hot encoded. A CSV holds flat inputs only
//! (the reader of [`crate::read_data`]).
//!
//! Memory: the archive's values (read by the NPZ reader within its budget), the batch, and for a
//! permuted array one more copy of it; the one-hot targets are labels × classes values, what the
//! description's output asks for. Nothing is allocated from a declared size before the values
//! are there.

use std::path::Path;

use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::graph::Shape;
use plumb_engine::{Batch, Features};

use crate::FileFormat;
use crate::data::{DataError, label, read_csv};
use crate::tensor::{DType, Tensor};
use crate::tensor_file::{Seen, read_tensors_kept};

/// The axis order of a spatial array in the file.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum AxisOrder {
    /// (m, channels, length) and (m, channels, height, width): the engine's own order.
    #[default]
    ChannelsFirst,
    /// (m, length, channels) and (m, height, width, channels), as `--channels-last` declares.
    ChannelsLast,
}

/// Read a data file (by extension: `.csv` or `.npz`) for a graph whose one-sample input and output
/// shapes are `input` and `output`. The batch's x is m × `input.size()`, y m × `output.size()`,
/// each row in C order of its shape; token ids are whole numbers in 0..vocabulary.
pub fn read_graph_data(
    path: &Path,
    input: &Shape,
    output: &Shape,
    order: AxisOrder,
) -> Result<Batch, DataError> {
    let Batch { x, y } = read_graph(path, input, output, order, false)?;
    Ok(Batch { x: x.into_f64(), y })
}

/// [`read_graph_data`], with a flat x that an archive of stored members (`np.savez`) holds in
/// f32 kept in f32 ([`Features::F32`]): `plumb grad`'s first dense layer widens it a block of
/// samples at a time. The same checks and messages; any other x is widened as read.
pub fn read_graph_data_kept(
    path: &Path,
    input: &Shape,
    output: &Shape,
    order: AxisOrder,
) -> Result<Batch<Features>, DataError> {
    read_graph(path, input, output, order, true)
}

fn read_graph(
    path: &Path,
    input: &Shape,
    output: &Shape,
    order: AxisOrder,
    keep: bool,
) -> Result<Batch<Features>, DataError> {
    let extension = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    let csv = match extension.as_deref() {
        Some("csv") => true,
        Some("npz") => false,
        _ => {
            return Err(DataError::UnknownExtension {
                path: path.to_path_buf(),
            });
        }
    };
    if order == AxisOrder::ChannelsLast && !is_spatial(input) {
        return Err(DataError::ChannelsLastNotSpatial {
            path: path.to_path_buf(),
            input: *input,
        });
    }
    if !csv {
        return read_npz(path, input, output, order, keep);
    }
    let (what, shape) = match (input, output) {
        (&Shape::Flat(inputs), &Shape::Flat(outputs)) => {
            let Batch { x, y } = read_csv(path, inputs, outputs)?;
            return Ok(Batch {
                x: Features::F64(x),
                y,
            });
        }
        (Shape::Flat(_), _) => ("output", *output),
        _ => ("input", *input),
    };
    Err(DataError::CsvNotFlat {
        path: path.to_path_buf(),
        what,
        shape,
    })
}

fn is_spatial(shape: &Shape) -> bool {
    matches!(shape, Shape::Signal { .. } | Shape::Image { .. })
}

/// One axis of a sample: its length, its name as a shape's axis ("channels", "length") and a
/// position along it ("channel 2", "position 7").
#[derive(Clone, Copy)]
struct Axis {
    len: usize,
    plural: &'static str,
    singular: &'static str,
}

const fn axis(len: usize, plural: &'static str, singular: &'static str) -> Axis {
    Axis {
        len,
        plural,
        singular,
    }
}

/// How one sample of x or y lies in the file: its axes in file order, and for each axis of the
/// engine's shape (C order) the file axis that holds it.
struct FileLayout {
    axes: Vec<Axis>,
    to_shape: Vec<usize>,
}

impl FileLayout {
    /// The layout of `shape` in the file under `order`; `last` names a flat or per-step vector's
    /// entries ("features" for x, "outputs" for y).
    fn of(shape: &Shape, order: AxisOrder, last: (&'static str, &'static str)) -> FileLayout {
        let vector = |len| axis(len, last.0, last.1);
        let (axes, to_shape) = match (*shape, order) {
            (Shape::Flat(n), _) => (vec![vector(n)], vec![0]),
            (Shape::Sequence { steps, width }, _) => (
                vec![axis(steps, "steps", "step"), vector(width)],
                vec![0, 1],
            ),
            (Shape::Tokens { steps, .. }, _) => (vec![axis(steps, "steps", "step")], vec![0]),
            (Shape::Signal { channels, length }, order) => {
                let c = axis(channels, "channels", "channel");
                let l = axis(length, "length", "position");
                match order {
                    AxisOrder::ChannelsFirst => (vec![c, l], vec![0, 1]),
                    AxisOrder::ChannelsLast => (vec![l, c], vec![1, 0]),
                }
            }
            (
                Shape::Image {
                    channels,
                    height,
                    width,
                },
                order,
            ) => {
                let c = axis(channels, "channels", "channel");
                let h = axis(height, "height", "row");
                let w = axis(width, "width", "column");
                match order {
                    AxisOrder::ChannelsFirst => (vec![c, h, w], vec![0, 1, 2]),
                    AxisOrder::ChannelsLast => (vec![h, w, c], vec![2, 0, 1]),
                }
            }
        };
        FileLayout { axes, to_shape }
    }

    fn dims(&self) -> Vec<usize> {
        self.axes.iter().map(|a| a.len).collect()
    }

    /// "(samples, 3, 50) (samples, channels, length)" with the samples' count or name first.
    fn text(&self, samples: &str) -> String {
        let dims: Vec<String> = self.axes.iter().map(|a| a.len.to_string()).collect();
        let names: Vec<&str> = self.axes.iter().map(|a| a.plural).collect();
        format!(
            "({samples}, {}), axes (samples, {})",
            dims.join(", "),
            names.join(", ")
        )
    }

    fn permuted(&self) -> bool {
        self.to_shape.iter().enumerate().any(|(k, &a)| k != a)
    }
}

/// The NumPy-style place of a flat C-order index of an array of `shape`: "[2, 5]" and, where
/// the axes have names, "sample 2, step 5".
fn place(shape: &[usize], names: &[&'static str], flat: usize) -> (Vec<usize>, String) {
    let mut index = vec![0; shape.len()];
    let mut rest = flat;
    for (slot, &n) in index.iter_mut().zip(shape).rev() {
        *slot = rest % n.max(1);
        rest /= n.max(1);
    }
    let words: Vec<String> = index
        .iter()
        .zip(names)
        .map(|(i, name)| format!("{name} {i}"))
        .collect();
    (index, words.join(", "))
}

/// The names of an array's axes for [`place`]: "sample", then the sample's axes.
fn element_names(layout: &FileLayout) -> Vec<&'static str> {
    std::iter::once("sample")
        .chain(layout.axes.iter().map(|a| a.singular))
        .collect()
}

/// Where value `flat` (in the engine's C order of one sample of `shape`) of sample `sample` of
/// array `array` (`"x"` or `"y"`) of a data archive read under `order` lies in the file: the
/// element's index as NumPy takes it and the same place in words, as the reader's own messages
/// name an element (an array stored without a length-1 axis is indexed as stored). `None` if the
/// archive no longer declares the array.
pub fn archive_place(
    path: &Path,
    array: &str,
    shape: &Shape,
    order: AxisOrder,
    sample: usize,
    flat: usize,
) -> Option<(Vec<usize>, String)> {
    let shapes = crate::npz::declared_shapes(path)?;
    let (_, stored) = shapes.into_iter().find(|(name, _)| name == array)?;
    let last = if array == "y" { Y_NAMES } else { X_NAMES };
    let layout = FileLayout::of(shape, order, last);
    let (engine, _) = place(&shape.dims(), &[], flat);
    let mut in_file = vec![0; engine.len()];
    for (&k, &axis) in engine.iter().zip(&layout.to_shape) {
        in_file[axis] = k;
    }
    let dims = layout.dims();
    let within = dims
        .iter()
        .zip(&in_file)
        .fold(0, |acc, (&n, &i)| acc * n + i);
    let per_sample: usize = dims.iter().product();
    Some(place(
        &stored,
        &element_names(&layout),
        sample * per_sample + within,
    ))
}

/// The names of a flat or per-step vector's entries in x and in y ([`FileLayout::of`]).
const X_NAMES: (&str, &str) = ("features", "feature");
const Y_NAMES: (&str, &str) = ("outputs", "output");

/// The arrays a data archive's reader uses; it lists any other member without reading it.
const DATA: [&str; 2] = ["x", "y"];

fn read_npz(
    path: &Path,
    input: &Shape,
    output: &Shape,
    order: AxisOrder,
    keep: bool,
) -> Result<Batch<Features>, DataError> {
    // The samples x declares, from its header: a pass holds at least the input and the output
    // of each sample twice, so a batch past the budget is refused before a byte is inflated.
    if let Some(shapes) = crate::npz::declared_shapes(path)
        && let Some((_, shape)) = shapes.iter().find(|(name, _)| name == "x")
        && let Some(&samples) = shape.first()
    {
        let per_sample = 2 * (input.size() + output.size()) as u64;
        let values = (samples as u64).saturating_mul(per_sample);
        if values > crate::MAX_BATCH_VALUES as u64 {
            return Err(DataError::TooManySamples {
                path: path.to_path_buf(),
                samples,
                values,
            });
        }
    }
    // Only a flat x is kept in f32: the engine's dense layer reads it so.
    let narrow = (keep && matches!(input, Shape::Flat(_))).then_some("x");
    // Any other member (a note, the labels' names) is listed from its header, never inflated.
    let (mut file, mut seen, kept) = read_tensors_kept(path, narrow, &|name| DATA.contains(&name))?;
    debug_assert_eq!(file.format, FileFormat::Npz);
    let mut names: Vec<String> = file.listing().map(|(name, ..)| name.to_string()).collect();
    if let Some((at, (x, _))) = &kept {
        names.insert(*at, x.name.clone());
    }
    let mut take = |name: &'static str| match file.tensors.iter().position(|t| t.name == name) {
        Some(i) => Ok((file.tensors.swap_remove(i), seen.swap_remove(i))),
        None => Err(DataError::MissingArray {
            path: path.to_path_buf(),
            name,
            found: names.clone(),
        }),
    };
    let x_layout = FileLayout::of(input, order, X_NAMES);
    let (x, m, y) = match kept {
        Some((_, (x, x_seen))) => {
            let y = take("y")?;
            let m = samples_of_x(path, input, order, &x_layout, &x.shape)?;
            if m == 0 {
                return Err(DataError::NoSamplesInArray {
                    path: path.to_path_buf(),
                });
            }
            check_finite(path, "x", &x_layout, &x, x_seen)?;
            let x = to_shape_order(&x_layout, m, x.data);
            let x = Array2::from_shape_vec((m, input.size()), x).expect("checked shape of x");
            (Features::F32(x), m, y)
        }
        None => {
            let ((x, x_seen), y) = (take("x")?, take("y")?);
            let m = samples_of_x(path, input, order, &x_layout, &x.shape)?;
            if m == 0 {
                return Err(DataError::NoSamplesInArray {
                    path: path.to_path_buf(),
                });
            }
            let x = if let Shape::Tokens { vocabulary, .. } = *input {
                token_ids(path, input, vocabulary, &x_layout, x)?
            } else {
                check_finite(path, "x", &x_layout, &x, x_seen)?;
                to_shape_order(&x_layout, m, x.data)
            };
            let x = Array2::from_shape_vec((m, input.size()), x).expect("checked shape of x");
            (Features::F64(x), m, y)
        }
    };
    let (y, y_seen) = y;

    let y_order = if is_spatial(output) {
        order
    } else {
        AxisOrder::ChannelsFirst
    };
    let y_layout = FileLayout::of(output, y_order, Y_NAMES);
    let y = match targets_of_y(path, output, order, &y_layout, &y, m)? {
        Targets::Values => {
            check_finite(path, "y", &y_layout, &y, y_seen)?;
            to_shape_order(&y_layout, m, y.data)
        }
        Targets::Labels { classes, steps } => one_hot(path, &y, classes, steps)?,
    };
    Ok(Batch {
        x,
        y: Array2::from_shape_vec((m, output.size()), y).expect("checked shape of y"),
    })
}

/// The number of samples in x, once its shape is the input's in the declared axis order.
fn samples_of_x(
    path: &Path,
    input: &Shape,
    order: AxisOrder,
    layout: &FileLayout,
    x_shape: &[usize],
) -> Result<usize, DataError> {
    let dims = layout.dims();
    match x_shape.split_first() {
        Some((&m, rest)) if rest == dims.as_slice() => return Ok(m),
        // A single feature may come as a vector of samples.
        Some((&m, [])) if *input == Shape::Flat(1) => return Ok(m),
        _ => {}
    }
    let intro = match *input {
        Shape::Flat(n) => format!("but the network has {n} inputs"),
        _ => format!("but the network's input is {input}"),
    };
    let mut expected = format!("{intro}: x must be {}", layout.text("samples"));
    if let Shape::Tokens { .. } = input {
        expected.push_str(" of integer token ids");
    }
    expected.push_str(&other_order(input, order, "x", x_shape));
    Err(DataError::ArrayShape {
        path: path.to_path_buf(),
        array: "x",
        shape: x_shape.to_vec(),
        expected,
    })
}

/// What `--channels-last` would change for a spatial shape, and whether the file holds the other
/// order (then the fix is the flag).
fn other_order(shape: &Shape, order: AxisOrder, array: &str, found: &[usize]) -> String {
    if !is_spatial(shape) {
        return String::new();
    }
    let (other, flag) = match order {
        AxisOrder::ChannelsFirst => (AxisOrder::ChannelsLast, "with --channels-last"),
        AxisOrder::ChannelsLast => (AxisOrder::ChannelsFirst, "without --channels-last"),
    };
    let layout = FileLayout::of(shape, other, ("", ""));
    let mut text = format!("; {flag}, {array} would be {}", layout.text("samples"));
    if found.len() == layout.axes.len() + 1 && found[1..] == layout.dims()[..] {
        // The flag is the fix for x; y follows x's order, so for y alone it is not.
        text.push_str(match (array, order) {
            ("x", AxisOrder::ChannelsFirst) => " — the file holds that order: add --channels-last",
            ("x", AxisOrder::ChannelsLast) => " — the file holds that order: drop --channels-last",
            _ => " — y holds that order, but x and y are read in one order: save both alike",
        });
    }
    text
}

/// How y's values are to be read.
enum Targets {
    /// Targets of the output's shape.
    Values,
    /// Class labels 0..classes, one per sample or (`steps` > 0) one per step.
    Labels { classes: usize, steps: usize },
}

fn targets_of_y(
    path: &Path,
    output: &Shape,
    order: AxisOrder,
    layout: &FileLayout,
    y: &Tensor,
    m: usize,
) -> Result<Targets, DataError> {
    let dims = layout.dims();
    let (rows, rest) = match y.shape.split_first() {
        Some((&rows, rest)) => (rows, rest),
        None => (0, &[][..]),
    };
    if rows == m && !y.shape.is_empty() {
        if rest == dims.as_slice() {
            return Ok(Targets::Values);
        }
        match (*output, rest) {
            // A single output, or a single output per step, may drop its axis of length 1.
            (Shape::Flat(1), []) => return Ok(Targets::Values),
            (Shape::Sequence { steps, width: 1 }, [s]) if *s == steps => {
                return Ok(Targets::Values);
            }
            (Shape::Flat(k), [] | [1]) if k > 1 => {
                return Ok(Targets::Labels {
                    classes: k,
                    steps: 0,
                });
            }
            (Shape::Sequence { steps, width }, [s]) if *s == steps && width > 1 => {
                return Ok(Targets::Labels {
                    classes: width,
                    steps,
                });
            }
            _ => {}
        }
    }
    let values = format!("({m}, {})", join(&dims));
    let labels = match *output {
        Shape::Flat(k) if k > 1 => format!(", or ({m},) / ({m}, 1) of class labels 0 to {}", k - 1),
        Shape::Sequence { steps, width } if width > 1 => format!(
            ", or ({m}, {steps}) of per-step class labels 0 to {}",
            width - 1
        ),
        _ => String::new(),
    };
    let axes = if matches!(output, Shape::Flat(_)) {
        String::new()
    } else {
        let names: Vec<&str> = layout.axes.iter().map(|a| a.plural).collect();
        format!(" (samples, {})", names.join(", "))
    };
    Err(DataError::ArrayShape {
        path: path.to_path_buf(),
        array: "y",
        shape: y.shape.clone(),
        expected: format!(
            "but x has {m} samples and the network's output is {output}: y must be \
             {values}{axes} of targets{labels}{}",
            other_order(output, order, "y", &y.shape)
        ),
    })
}

fn join(dims: &[usize]) -> String {
    let parts: Vec<String> = dims.iter().map(usize::to_string).collect();
    parts.join(", ")
}

/// The values of an array in C order of the engine's shape: permuted when the file's axes are in
/// another order, moved as they are otherwise.
fn to_shape_order<T: Copy>(layout: &FileLayout, m: usize, data: Vec<T>) -> Vec<T> {
    if !layout.permuted() {
        return data;
    }
    let mut file_shape = vec![m];
    file_shape.extend(layout.dims());
    let mut axes = vec![0];
    axes.extend(layout.to_shape.iter().map(|a| a + 1));
    let array = ArrayD::from_shape_vec(IxDyn(&file_shape), data).expect("checked shape");
    array.permuted_axes(IxDyn(&axes)).iter().copied().collect()
}

fn check_finite<T: Copy + Into<f64>>(
    path: &Path,
    array: &'static str,
    layout: &FileLayout,
    tensor: &Tensor<T>,
    seen: Seen,
) -> Result<(), DataError> {
    let first = seen.unwrap_or_else(|| tensor.data.iter().position(|&v| !v.into().is_finite()));
    let Some(flat) = first else {
        return Ok(());
    };
    let (index, place) = place(&tensor.shape, &element_names(layout), flat);
    Err(DataError::BadElement {
        path: path.to_path_buf(),
        array,
        index,
        place,
        problem: format!(
            "{} is not finite; data must be finite — remove or impute the sample",
            tensor.data[flat].into()
        ),
    })
}

/// Token ids of an integer x, each checked to lie in 0..vocabulary.
fn token_ids(
    path: &Path,
    input: &Shape,
    vocabulary: usize,
    layout: &FileLayout,
    x: Tensor,
) -> Result<Vec<f64>, DataError> {
    let names = element_names(layout);
    if !is_integer(x.dtype) {
        // Name the first value that is not a whole number, if there is one: that is the
        // likeliest sign of the wrong array saved as x.
        let fraction = x
            .data
            .iter()
            .position(|v| v.fract() != 0.0 || !v.is_finite())
            .map(|flat| {
                let (index, place) = place(&x.shape, &names, flat);
                (index, place, x.data[flat])
            });
        return Err(DataError::TokensNotInteger {
            path: path.to_path_buf(),
            dtype: x.dtype,
            input: *input,
            fraction,
        });
    }
    if let Some(flat) = x
        .data
        .iter()
        .position(|&v| !(0.0..vocabulary as f64).contains(&v))
    {
        let (index, place) = place(&x.shape, &names, flat);
        let value = x.data[flat];
        // An id past 2^53 was rounded on widening to f64: say so rather than print a wrong id.
        let id = if value.abs() < 2f64.powi(53) {
            format!("{value}")
        } else {
            format!("about {value:e}")
        };
        return Err(DataError::BadElement {
            path: path.to_path_buf(),
            array: "x",
            index,
            place,
            problem: format!(
                "the token id {id} is outside the vocabulary: ids run from 0 to {} (the input \
                 declares vocabulary = {vocabulary})",
                vocabulary - 1
            ),
        });
    }
    Ok(x.data)
}

fn is_integer(dtype: DType) -> bool {
    matches!(
        dtype,
        DType::I8
            | DType::I16
            | DType::I32
            | DType::I64
            | DType::U8
            | DType::U16
            | DType::U32
            | DType::U64
    )
}

/// Class labels (one per sample, or one per step) as one-hot rows.
fn one_hot(path: &Path, y: &Tensor, classes: usize, steps: usize) -> Result<Vec<f64>, DataError> {
    let names: &[&str] = if steps > 0 {
        &["sample", "step"]
    } else {
        &["sample"]
    };
    // Budgeted before a row is built: a few labels over many classes are gigabytes of rows.
    let values = (y.data.len() as u64).saturating_mul(classes as u64);
    let bytes = values.saturating_mul(8);
    let mut out = Vec::new();
    let limit = values > crate::MAX_BATCH_VALUES as u64;
    if limit || out.try_reserve_exact(values as usize).is_err() {
        return Err(DataError::TooManyTargets {
            path: path.to_path_buf(),
            labels: y.data.len(),
            classes,
            bytes,
            refused: !limit,
        });
    }
    for (flat, &value) in y.data.iter().enumerate() {
        let class = label(value, classes).map_err(|problem| {
            let (index, place) = place(&y.shape, names, flat);
            DataError::BadElement {
                path: path.to_path_buf(),
                array: "y",
                index,
                place,
                problem: format!("the value {value} {problem}"),
            }
        })?;
        out.extend((0..classes).map(|k| if k == class { 1.0 } else { 0.0 }));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn places_name_the_axes() {
        let layout = FileLayout::of(
            &Shape::Image {
                channels: 2,
                height: 3,
                width: 4,
            },
            AxisOrder::ChannelsLast,
            ("features", "feature"),
        );
        let (index, words) = place(&[5, 3, 4, 2], &element_names(&layout), 2 * 24 + 8 + 2 + 1);
        assert_eq!(index, [2, 1, 1, 1]);
        assert_eq!(words, "sample 2, row 1, column 1, channel 1");
    }
}
