//! Data files: a CSV with a header row, or an NPZ with arrays `x` and `y`, turned into a batch of
//! features and targets for a network with `inputs` inputs and `outputs` output units. The NPZ
//! reader is the layer graph's ([`crate::read_graph_data`]) on flat shapes; the CSV reader is
//! this file's, and the graph's reader uses it for flat inputs.
//!
//! A single integer target column (or 1-D `y`) with several output units holds class labels, which
//! are one-hot encoded: that is how labelled data is usually kept, and refusing it would only make
//! people write a conversion script.

use std::path::{Path, PathBuf};

use ndarray::Array2;
use plumb_engine::Batch;
use plumb_engine::graph::Shape;

use crate::graph_data::{AxisOrder, read_graph_data};
use crate::tensor::{DType, TensorFileError, shape_text};

/// Offending text is quoted up to this many characters.
const QUOTE_CHARS: usize = 40;

/// Why a data file could not be used. Every variant names the file and the place in it: line
/// (1-based, the header being line 1) and column for CSV, array and index for NPZ.
#[derive(Debug, thiserror::Error)]
pub enum DataError {
    #[error("{}: cannot read the file: {source}", .path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },

    #[error(
        "{}: unknown data file extension; plumb reads .csv (with a header row) and .npz (arrays \
         `x` and `y`)",
        .path.display()
    )]
    UnknownExtension { path: PathBuf },

    #[error(
        "{}: the file is empty; a data file starts with a header row naming the columns, then one \
         sample per line",
        .path.display()
    )]
    Empty { path: PathBuf },

    #[error(
        "{}: line 1 holds only numbers, but it must name the columns; add a header row (plumb \
         would otherwise take the first sample for one)",
        .path.display()
    )]
    NoHeader { path: PathBuf },

    #[error(
        "{}: there is a header row but no samples; add one sample per line after it",
        .path.display()
    )]
    NoSamples { path: PathBuf },

    #[error(
        "{}: array `x` holds no samples (its first axis has length 0); save at least one sample",
        .path.display()
    )]
    NoSamplesInArray { path: PathBuf },

    #[error(
        "{}: line 1: the header has {found} columns, but the network needs {inputs} features + \
         {outputs} targets = {}{}; add or remove columns, or fix `inputs` and the output layer's \
         units in the network description",
        .path.display(), .inputs + .outputs, label_alternative(*.inputs, *.outputs)
    )]
    ColumnCount {
        path: PathBuf,
        found: usize,
        inputs: usize,
        outputs: usize,
    },

    #[error(
        "{}: line {line}: {found} fields where the header has {expected}; every row needs one \
         value per column",
        .path.display()
    )]
    Ragged {
        path: PathBuf,
        line: u64,
        expected: usize,
        found: usize,
    },

    #[error(
        "{}: a quoted field is never closed (an odd number of `\"` in the file; the last line \
         read is {line}); close the quote, or double a quote inside a field",
        .path.display()
    )]
    Unterminated { path: PathBuf, line: u64 },

    #[error(
        "{}: line {line}: a quoted field opened on this line is not closed before the line \
         ends, so the lines after it were read into that field; close the quote, or double a \
         quote inside a field",
        .path.display()
    )]
    OpenQuote { path: PathBuf, line: u64 },

    #[error(
        "{}: array `x` declares {samples} samples, whose pass would hold at least {values} \
         values, past the 2^27 plumb holds for a batch; a gradient check needs a batch, not a \
         whole data set: save a few hundred samples",
        .path.display()
    )]
    TooManySamples {
        path: PathBuf,
        samples: usize,
        values: u64,
    },

    #[error(
        "{}: {labels} class labels one-hot over {classes} classes are {} of targets{}; a \
         gradient check needs a batch, not a whole data set: save a few hundred samples, or check \
         the output layer's units",
        .path.display(), bytes_text(*.bytes), if *.refused { ", more than the machine would \
         give" } else { ", past the 2^27 values plumb holds for a batch" }
    )]
    TooManyTargets {
        path: PathBuf,
        labels: usize,
        classes: usize,
        bytes: u64,
        refused: bool,
    },

    #[error(
        "{}: line {line}: the {samples} samples before this line already hold {} of values{}; \
         a gradient check needs a batch, not a whole data set: save a few hundred samples \
         (e.g. `head -n 1001 {}` for the header and 1,000 rows)",
        .path.display(), bytes_text(*.bytes), if *.refused { ", and the machine would not give \
         more memory" } else { ", plumb's limit for a data file's values" }, .path.display()
    )]
    TooManyValues {
        path: PathBuf,
        line: u64,
        samples: usize,
        /// Bytes the parsed values take (8 per value).
        bytes: u64,
        /// The allocator refused the memory (true), or the values reached the limit (false).
        refused: bool,
    },

    #[error("{}: line {line}, column `{column}`: {problem}", .path.display())]
    BadValue {
        path: PathBuf,
        line: u64,
        column: String,
        /// What is wrong, with the offending text quoted.
        problem: String,
    },

    #[error(
        "{}: line {line}: {}; save the data as UTF-8 comma-separated text",
        .path.display(), csv_problem(.error)
    )]
    Csv {
        path: PathBuf,
        line: u64,
        /// Not a `source`: its own text counts lines otherwise (`csv_problem`).
        error: csv::Error,
    },

    /// The NPZ could not be read as a tensor file (boxed: it is by far the largest variant).
    #[error(transparent)]
    Tensors(Box<TensorFileError>),

    #[error(
        "{}: no array `{name}` (the archive holds {}); save the data with \
         np.savez(path, x=..., y=...)",
        .path.display(), list(.found)
    )]
    MissingArray {
        path: PathBuf,
        name: &'static str,
        found: Vec<String>,
    },

    #[error("{}: array `{array}` has shape {}, {expected}", .path.display(), shape_text(.shape))]
    ArrayShape {
        path: PathBuf,
        array: &'static str,
        shape: Vec<usize>,
        /// What shape was expected and why.
        expected: String,
    },

    #[error(
        "{}: array `{array}`, element {} ({place}): {problem}",
        .path.display(), index_text(.index)
    )]
    BadElement {
        path: PathBuf,
        array: &'static str,
        /// The element's index as NumPy takes it.
        index: Vec<usize>,
        /// The same place in words: "sample 2, step 5", "sample 0, channel 1, position 7".
        place: String,
        problem: String,
    },

    #[error(
        "{}: array `x` is {dtype}, but the network's input is {input}, which takes integer \
         token ids: save x with an integer dtype, e.g. x.astype(np.int64){}",
        .path.display(), fraction_text(.fraction)
    )]
    TokensNotInteger {
        path: PathBuf,
        dtype: DType,
        input: Shape,
        /// The first element that is not a whole number, if any: index, place in words, value.
        fraction: Option<(Vec<usize>, String, f64)>,
    },

    #[error(
        "{}: CSV holds flat data only (one row of numbers per sample), but the network's \
         {what} is {shape}; save x and y with np.savez(path, x=..., y=...) and give the .npz",
        .path.display()
    )]
    CsvNotFlat {
        path: PathBuf,
        /// "input" or "output".
        what: &'static str,
        shape: Shape,
    },

    #[error(
        "{}: --channels-last reads arrays whose channels come last, but the network's input is \
         {input}, which has no channel axis; drop --channels-last",
        .path.display()
    )]
    ChannelsLastNotSpatial { path: PathBuf, input: Shape },
}

impl From<TensorFileError> for DataError {
    fn from(error: TensorFileError) -> DataError {
        DataError::Tensors(Box::new(error))
    }
}

fn label_alternative(inputs: usize, outputs: usize) -> String {
    if outputs > 1 {
        format!(
            " columns, or {inputs} features + 1 label column = {}",
            inputs + 1
        )
    } else {
        " columns".to_string()
    }
}

fn fraction_text(fraction: &Option<(Vec<usize>, String, f64)>) -> String {
    match fraction {
        Some((index, place, value)) => format!(
            " (element {} ({place}) is {value}, not a whole number: is this the right array?)",
            index_text(index)
        ),
        None => String::new(),
    }
}

/// A byte count in MiB, or GiB from 1 GiB on.
fn bytes_text(bytes: u64) -> String {
    let mib = bytes as f64 / f64::from(1u32 << 20);
    if mib >= 1024.0 {
        format!("{:.1} GiB", mib / 1024.0)
    } else {
        format!("{mib:.1} MiB")
    }
}

/// An index as NumPy takes it: `[3]`, `[2, 1]`.
/// What the CSV reader found wrong, without its own count of lines (the message's line is
/// plumb's, which counts the empty lines the reader skips).
fn csv_problem(e: &csv::Error) -> String {
    match e.kind() {
        csv::ErrorKind::Utf8 { err, .. } => {
            format!(
                "CSV parse error: invalid UTF-8 in field {}",
                err.field() + 1
            )
        }
        csv::ErrorKind::Io(io) => format!("CSV read error: {io}"),
        _ => format!("CSV parse error: {e}"),
    }
}

fn index_text(index: &[usize]) -> String {
    let parts: Vec<String> = index.iter().map(usize::to_string).collect();
    format!("[{}]", parts.join(", "))
}

fn list(names: &[String]) -> String {
    if names.is_empty() {
        return "no arrays".to_string();
    }
    let quoted: Vec<String> = names.iter().map(|n| format!("`{n}`")).collect();
    quoted.join(", ")
}

fn quote(text: &str) -> String {
    let mut chars = text.chars();
    let head: String = chars.by_ref().take(QUOTE_CHARS).collect();
    if chars.next().is_some() {
        format!("`{head}…`")
    } else {
        format!("`{head}`")
    }
}

/// Read a data file (by extension: `.csv` or `.npz`) for a network with `inputs` features and
/// `outputs` output units: [`read_graph_data`] on flat shapes.
pub fn read_data(path: &Path, inputs: usize, outputs: usize) -> Result<Batch, DataError> {
    read_graph_data(
        path,
        &Shape::Flat(inputs),
        &Shape::Flat(outputs),
        AxisOrder::ChannelsFirst,
    )
}

/// The most a CSV's parsed values may take (4 GiB, 512 Mi values as f64): past it the file is
/// refused, before the machine's memory is what stops it.
const MAX_VALUE_BYTES: u64 = crate::MAX_DATA_BYTES;

/// How the target columns of a file are to be read.
#[derive(Clone, Copy)]
enum Targets {
    /// One column per output unit, taken as they are.
    Values,
    /// One column of class labels 0..outputs−1.
    Labels,
}

pub(crate) fn read_csv(path: &Path, inputs: usize, outputs: usize) -> Result<Batch, DataError> {
    // Streamed, not read whole: memory is what the samples hold, and an error on line 2 is
    // found without reading the rest.
    let mut reader = csv_reader(path)?;
    let csv_error = |line: u64, error: csv::Error| DataError::Csv {
        path: path.to_path_buf(),
        line,
        error,
    };
    let header = reader.headers().map_err(|e| csv_error(1, e))?.clone();
    if header.is_empty() || (header.len() == 1 && header[0].is_empty()) {
        return Err(DataError::Empty {
            path: path.to_path_buf(),
        });
    }
    if header.iter().all(|name| name.parse::<f64>().is_ok()) {
        return Err(DataError::NoHeader {
            path: path.to_path_buf(),
        });
    }
    let columns = header.len();
    let targets = if columns == inputs + outputs {
        Targets::Values
    } else if outputs > 1 && columns == inputs + 1 {
        Targets::Labels
    } else {
        return Err(DataError::ColumnCount {
            path: path.to_path_buf(),
            found: columns,
            inputs,
            outputs,
        });
    };

    let mut x = Vec::new();
    let mut y = Vec::new();
    let mut rows = 0usize;
    let mut record = csv::StringRecord::new();
    let per_row = inputs + outputs;
    loop {
        let line = reader.position().line();
        match reader.read_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => {
                let line = e.position().map_or(line, |p| started(path, p));
                return Err(csv_error(line, e));
            }
        }
        // Counted only on the way to an error: it reads the file again.
        let line_of = || record.position().map_or(line, |p| started(path, p));
        // An empty line yields no record at all; any other row of the wrong number of fields is
        // an error, a row holding only `""` included (it is not a sample, and dropping it would
        // change the batch silently).
        // No number spans lines: a field that does swallowed them behind an open quote.
        if record.iter().any(|f| f.contains(['\n', '\r'])) {
            return Err(DataError::OpenQuote {
                path: path.to_path_buf(),
                line: line_of(),
            });
        }
        if record.len() != columns {
            return Err(DataError::Ragged {
                path: path.to_path_buf(),
                line: line_of(),
                expected: columns,
                found: record.len(),
            });
        }
        // Room for the row, asked of the allocator fallibly: a file of short valid rows can hold
        // more values than the machine has memory for (4 GiB of "0," is 2 Gi values).
        let held = (x.len() + y.len()) as u64 * 8;
        let limit = held + per_row as u64 * 8 > MAX_VALUE_BYTES;
        if limit || x.try_reserve(inputs).is_err() || y.try_reserve(outputs).is_err() {
            return Err(DataError::TooManyValues {
                path: path.to_path_buf(),
                line: line_of(),
                samples: rows,
                bytes: held,
                refused: !limit,
            });
        }
        let bad = |column: usize, problem: String| DataError::BadValue {
            path: path.to_path_buf(),
            line: line_of(),
            column: header[column].to_string(),
            problem,
        };
        for (column, field) in record.iter().enumerate() {
            let value = number(field).map_err(|problem| bad(column, problem))?;
            if column < inputs {
                x.push(value);
            } else {
                match targets {
                    Targets::Values => y.push(value),
                    Targets::Labels => {
                        let class = label(value, outputs).map_err(|problem| {
                            bad(column, format!("{} {problem}", quote(field)))
                        })?;
                        y.extend((0..outputs).map(|k| if k == class { 1.0 } else { 0.0 }));
                    }
                }
            }
        }
        rows += 1;
    }
    if reader.get_ref().count % 2 == 1 {
        // Every field that opens a quote closes it, and a quote inside one is doubled: a
        // whole file has an even number of them. The reader takes the end of the file as the
        // closing quote; plumb does not.
        return Err(DataError::Unterminated {
            path: path.to_path_buf(),
            line: reader.position().line(),
        });
    }
    if rows == 0 {
        return Err(DataError::NoSamples {
            path: path.to_path_buf(),
        });
    }
    Ok(Batch {
        x: Array2::from_shape_vec((rows, inputs), x).expect("one row of features per sample"),
        y: Array2::from_shape_vec((rows, outputs), y).expect("one row of targets per sample"),
    })
}

/// The CSV reader of a data file, as [`read_data`] reads it.
fn csv_reader(path: &Path) -> Result<csv::Reader<Quotes<std::io::Take<std::fs::File>>>, DataError> {
    let file =
        crate::input::open_input(path, crate::MAX_DATA_BYTES).map_err(|source| DataError::Io {
            path: path.to_path_buf(),
            source,
        })?;
    Ok(csv::ReaderBuilder::new()
        .has_headers(true)
        // Row lengths are checked by the caller, to report them with the header's count.
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(Quotes {
            inner: std::io::Read::take(file, crate::MAX_DATA_BYTES),
            count: 0,
        }))
}

/// Where sample `sample` (from 0) of a CSV data file [`read_data`] read is: the line (from 1)
/// its record starts on and the header's name of column `column` (from 0). `None` if the file
/// no longer reads so far.
pub fn csv_place(path: &Path, sample: usize, column: usize) -> Option<(u64, String)> {
    let mut reader = csv_reader(path).ok()?;
    let name = reader.headers().ok()?.get(column)?.to_string();
    let mut record = csv::StringRecord::new();
    for _ in 0..=sample {
        if !reader.read_record(&mut record).ok()? {
            return None;
        }
    }
    Some((started(path, record.position()?), name))
}

/// The line (from 1) a record begins on, counting every line end an editor counts (`\r\n`,
/// `\n` or a lone `\r`): the line ends before the reader's position of the record, and those
/// of the empty lines it skipped from there (that position is where it began looking for the
/// record). The file is read from its start in small pieces, up to the record; only on the way
/// to a message. The reader's own line (which counts line feeds only) if the file does not read.
fn started(path: &Path, at: &csv::Position) -> u64 {
    use std::io::Read;
    let count = || -> Option<u64> {
        let file = crate::input::open_input(path, crate::MAX_DATA_BYTES).ok()?;
        let mut file = file.take(crate::MAX_DATA_BYTES);
        let mut piece = [0u8; 4096];
        let (mut line, mut read, mut after_cr) = (1u64, 0u64, false);
        loop {
            let n = file.read(&mut piece).ok()?;
            if n == 0 {
                return Some(line);
            }
            for &b in &piece[..n] {
                if read >= at.byte() && b != b'\r' && b != b'\n' {
                    return Some(line);
                }
                match b {
                    b'\n' if after_cr => {}
                    b'\n' | b'\r' => line += 1,
                    _ => {}
                }
                after_cr = b == b'\r';
                read += 1;
            }
        }
    };
    count().unwrap_or(at.line())
}

/// A reader that counts the quote characters passing through it.
struct Quotes<R> {
    inner: R,
    count: u64,
}

impl<R: std::io::Read> std::io::Read for Quotes<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.count += buf[..n].iter().filter(|&&b| b == b'"').count() as u64;
        Ok(n)
    }
}

/// A finite number, or what is wrong with the text.
fn number(field: &str) -> Result<f64, String> {
    if field.is_empty() {
        return Err("the field is empty; every sample needs a number in every column".to_string());
    }
    match field.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err(format!(
            "{} is not a finite number; data must be finite — remove or impute the sample",
            quote(field)
        )),
        Err(_) => Err(format!("{} is not a number", quote(field))),
    }
}

/// The class a label value names, or why it names none.
pub(crate) fn label(value: f64, classes: usize) -> Result<usize, String> {
    let valid = format!(
        "labels are integers 0 to {} (the output layer has {classes} units)",
        classes - 1
    );
    if value.fract() != 0.0 {
        return Err(format!("is not an integer class label; {valid}"));
    }
    if value < 0.0 || value >= classes as f64 {
        return Err(format!("is outside 0..={}; {valid}", classes - 1));
    }
    Ok(value as usize)
}
