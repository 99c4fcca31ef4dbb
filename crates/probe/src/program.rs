//! A running outside program and the requests plumb makes of it.
//!
//! Three threads keep the main one from ever blocking on the program: one writes requests to its
//! stdin, one reads and frames its stdout, one keeps the last lines of its stderr (and passes them
//! through). The main thread only waits on a channel, with the timeout.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use serde_json::{Value, json};

use crate::ProbeError;

/// The protocol version this plumb speaks.
pub const PROTOCOL: u32 = 1;

/// The longest header line plumb reads (a header is a few hundred bytes).
const MAX_LINE: u64 = 1 << 20;
/// The most float64 values one reply may carry (1 GiB).
const MAX_VALUES: u64 = 1 << 27;
/// Lines of the program's stderr kept for error messages.
const TAIL: usize = 12;

/// A tensor as the protocol names it.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TensorSpec {
    pub name: String,
    pub shape: Vec<usize>,
}

impl TensorSpec {
    pub fn len(&self) -> usize {
        self.shape.iter().product()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    fn json(&self) -> Value {
        json!({"name": self.name, "shape": self.shape})
    }
}

/// A gradient reply: the loss, and each tensor with the values the program sent for it.
pub type Gradient = (f64, Vec<(TensorSpec, Vec<f64>)>);

/// The program's answer to hello.
#[derive(Clone, Debug, PartialEq)]
pub struct Hello {
    pub name: String,
    /// `"f64"` or `"f32"`: the arithmetic it computes in.
    pub dtype: String,
    pub tensors: Vec<TensorSpec>,
    /// The shape of one sample's input and of its target, if the program says (optional hello
    /// keys `x` and `y`): what a black box without a description needs to draw data for it.
    pub x: Option<Vec<usize>>,
    pub y: Option<Vec<usize>>,
    /// Whether its gradient replies end with the input gradient, a tensor `input` of the loaded
    /// x's shape (optional hello key `"input_gradient": true`).
    pub input_gradient: bool,
}

/// One change of a perturbation: add `delta` to entry `index` (flat, C order) of tensor `tensor`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Change {
    pub perturbation: u32,
    pub tensor: u32,
    pub index: u64,
    pub delta: f64,
}

struct Message {
    header: Value,
    payload: Vec<f64>,
}

#[derive(Debug)]
enum ReadError {
    Eof,
    /// The program stopped in the middle of a line.
    Cut(String),
    Garbage(String),
    Malformed(String),
    NonFinite(String),
    /// Writing the request failed: the program closed its end of the pipe (written by the
    /// writer thread, not the reader).
    StdinClosed,
}

/// A running program.
pub struct Program {
    child: Child,
    /// The most float64 values the reply to the current request may announce (the reader checks
    /// before it allocates).
    limit: Arc<AtomicU64>,
    /// The parameters the program declared, and x's values when it sends the input gradient
    /// (for the gradient reply's limit).
    declared: u64,
    /// Whether the hello said gradient replies carry the input gradient.
    input_gradient: bool,
    /// Requests made, and losses asked for in `losses` requests.
    requests: usize,
    losses_asked: usize,
    command: String,
    writer: Option<Sender<Vec<u8>>>,
    /// The write end of the program's stdin (owned by the writer thread while `writer` lives),
    /// to tell a program that closed its stdin from one that is slow.
    stdin_fd: std::os::fd::RawFd,
    replies: Receiver<Result<Message, ReadError>>,
    stderr: Arc<Mutex<VecDeque<String>>>,
    timeout: Duration,
}

impl Program {
    /// Starts `command[0]` with the rest as arguments; its stderr lines are passed through to
    /// plumb's stderr unless `quiet`.
    pub fn start(command: &[String], timeout: Duration) -> Result<Program, ProbeError> {
        Program::start_with(command, timeout, false)
    }

    pub fn start_with(
        command: &[String],
        timeout: Duration,
        quiet: bool,
    ) -> Result<Program, ProbeError> {
        let text = command.join(" ");
        let Some((cmd, args)) = command.split_first() else {
            return Err(ProbeError::Spawn {
                command: text,
                reason: "no command given".into(),
            });
        };
        let mut command = Command::new(cmd);
        command.args(args);
        // Its own process group, so that a timeout stops everything it started, not only itself.
        #[cfg(unix)]
        {
            use std::os::unix::process::CommandExt;
            command.process_group(0);
        }
        let mut child = command
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .map_err(|e| ProbeError::Spawn {
                command: text.clone(),
                reason: e.to_string(),
            })?;
        let mut stdin = child.stdin.take().expect("piped");
        let stdin_fd = std::os::fd::AsRawFd::as_raw_fd(&stdin);
        let stdout = child.stdout.take().expect("piped");
        let stderr = child.stderr.take().expect("piped");

        let (rtx, rrx) = mpsc::channel();
        let (wtx, wrx) = mpsc::channel::<Vec<u8>>();
        let closed = rtx.clone();
        thread::spawn(move || {
            for buf in wrx {
                if let Err(e) = stdin.write_all(&buf).and_then(|_| stdin.flush()) {
                    // Said at once, rather than waiting out the timeout for an answer that
                    // cannot come: the program never read this request.
                    if e.kind() == std::io::ErrorKind::BrokenPipe {
                        let _ = closed.send(Err(ReadError::StdinClosed));
                    }
                    break;
                }
            }
        });
        let limit = Arc::new(AtomicU64::new(0));
        let reader_limit = Arc::clone(&limit);
        thread::spawn(move || read_replies(stdout, &reader_limit, |m| rtx.send(m).is_ok()));
        let tail = Arc::new(Mutex::new(VecDeque::new()));
        let keep = Arc::clone(&tail);
        thread::spawn(move || {
            // Bytes, in bounded pieces, to the end: a program must never block on a full stderr
            // pipe, and neither invalid UTF-8 nor a line without end may stop or swell the reader.
            let mut r = BufReader::new(stderr);
            loop {
                let mut piece = Vec::new();
                match (&mut r).take(4096).read_until(b'\n', &mut piece) {
                    Ok(0) | Err(_) => break,
                    Ok(_) => {}
                }
                let line = String::from_utf8_lossy(&piece).trim_end().to_string();
                if !quiet {
                    eprintln!("  [program] {line}");
                }
                let mut t = keep.lock().expect("not poisoned");
                if t.len() == TAIL {
                    t.pop_front();
                }
                t.push_back(line);
            }
        });
        Ok(Program {
            child,
            limit,
            declared: 0,
            input_gradient: false,
            requests: 0,
            losses_asked: 0,
            command: text,
            writer: Some(wtx),
            stdin_fd,
            replies: rrx,
            stderr: tail,
            timeout,
        })
    }

    /// The command line, for reports.
    pub fn command(&self) -> &str {
        &self.command
    }

    /// (requests made, losses asked for through `losses`): the round trips a check cost.
    pub fn traffic(&self) -> (usize, usize) {
        (self.requests, self.losses_asked)
    }

    /// The handshake. With `expected`, the program's tensors must be exactly those (names, shapes,
    /// order); without it (a black box), its declaration is taken as it is.
    pub fn hello(&mut self, expected: Option<&[TensorSpec]>) -> Result<Hello, ProbeError> {
        let mut header = json!({"type": "hello", "protocol": PROTOCOL});
        if let Some(e) = expected {
            header["tensors"] = Value::Array(e.iter().map(TensorSpec::json).collect());
        }
        let reply = self.request("hello", &header, &[], "hello")?;
        let hello = hello_reply(&reply.header, expected)?;
        self.declared = hello.tensors.iter().map(|t| t.len() as u64).sum();
        self.input_gradient = hello.input_gradient;
        Ok(hello)
    }

    /// Sends the parameters (in the hello's order) and the data, x and y each with its shape
    /// (samples first); waits for `ready`.
    pub fn load(
        &mut self,
        tensors: &[(TensorSpec, &[f64])],
        x: (&[usize], &[f64]),
        y: (&[usize], &[f64]),
    ) -> Result<(), ProbeError> {
        if self.input_gradient {
            // The gradient reply also carries the input gradient, one value per value of x.
            self.declared = self.declared.saturating_add(x.1.len() as u64);
        }
        let header = json!({
            "type": "load",
            "tensors": tensors.iter().map(|(s, _)| s.json()).collect::<Vec<_>>(),
            "x": {"shape": x.0},
            "y": {"shape": y.0},
        });
        let mut payload = Vec::new();
        for (_, data) in tensors {
            push_f64(&mut payload, data);
        }
        push_f64(&mut payload, x.1);
        push_f64(&mut payload, y.1);
        self.request("load", &header, &payload, "ready").map(|_| ())
    }

    /// The program's loss at the loaded parameters.
    pub fn loss(&mut self) -> Result<f64, ProbeError> {
        let r = self.request("loss", &json!({"type": "loss"}), &[], "loss")?;
        finite_loss(&r.header, "loss")
    }

    /// The program's loss and gradient; each tensor with the shape the reply gives it.
    pub fn gradient(&mut self) -> Result<Gradient, ProbeError> {
        let r = self.request("gradient", &json!({"type": "gradient"}), &[], "gradient")?;
        gradient_reply(&r)
    }

    /// The loss at `count` perturbations of the loaded parameters, each the changes with its number.
    pub fn losses(&mut self, count: usize, changes: &[Change]) -> Result<Vec<f64>, ProbeError> {
        let header = json!({"type": "losses", "perturbations": count, "changes": changes.len()});
        let mut payload = Vec::with_capacity(changes.len() * 24);
        for c in changes {
            payload.extend_from_slice(&c.perturbation.to_le_bytes());
            payload.extend_from_slice(&c.tensor.to_le_bytes());
            payload.extend_from_slice(&c.index.to_le_bytes());
            payload.extend_from_slice(&c.delta.to_le_bytes());
        }
        let r = self.request("losses", &header, &payload, "losses")?;
        losses_reply(r, count)
    }

    /// Says goodbye and waits for the program to exit (killing it after the timeout).
    pub fn finish(mut self) {
        if let Some(w) = self.writer.take() {
            let _ = w.send(b"{\"type\":\"bye\"}\n".to_vec());
        }
        let start = Instant::now();
        let grace = self.timeout.min(Duration::from_secs(5));
        while start.elapsed() < grace {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            thread::sleep(Duration::from_millis(10));
        }
        self.kill_group();
        let _ = self.child.wait();
    }

    fn tail(&self) -> Vec<String> {
        self.stderr
            .lock()
            .map(|t| t.iter().cloned().collect())
            .unwrap_or_default()
    }

    fn request(
        &mut self,
        request: &str,
        header: &Value,
        payload: &[u8],
        reply: &str,
    ) -> Result<Message, ProbeError> {
        // The reader refuses to allocate more than this request calls for.
        let limit = match reply {
            "gradient" => self.declared,
            "losses" => header
                .get("perturbations")
                .and_then(Value::as_u64)
                .unwrap_or(0),
            _ => 0,
        };
        self.limit.store(limit, Ordering::SeqCst);
        self.requests += 1;
        if reply == "losses" {
            self.losses_asked += limit as usize;
        }
        let mut buf = serde_json::to_vec(header).expect("a header serialises");
        buf.push(b'\n');
        buf.extend_from_slice(payload);
        let sent = self.writer.as_ref().is_some_and(|w| w.send(buf).is_ok());
        if !sent {
            return Err(ProbeError::Send {
                request: request.into(),
                reason: "the program's stdin is closed".into(),
                stderr: self.tail(),
            });
        }
        match self.replies.recv_timeout(self.timeout) {
            Ok(Ok(m)) => accept(m, request, reply),
            Ok(Err(ReadError::Garbage(text))) => {
                self.stop();
                Err(ProbeError::Garbage {
                    request: request.into(),
                    text,
                })
            }
            Ok(Err(ReadError::Malformed(what))) => {
                self.stop();
                Err(malformed(request, what))
            }
            Ok(Err(ReadError::NonFinite(text))) => {
                self.stop();
                Err(ProbeError::NonFinite {
                    what: format!("reply to the {request} request"),
                    value: f64::NAN,
                    place: format!("(it writes NaN or Infinity into its JSON: `{text}`)"),
                })
            }
            Ok(Err(ReadError::Cut(text))) => {
                let status = self.exit_status();
                Err(ProbeError::Exited {
                    status,
                    when: format!(
                        "in the middle of its reply to the {request} request (it wrote `{text}` and no end of line)"
                    ),
                    stderr: self.tail(),
                })
            }
            Ok(Err(ReadError::StdinClosed)) if !self.exited() => {
                self.stop();
                Err(ProbeError::StdinClosed {
                    request: request.into(),
                    stderr: self.tail(),
                })
            }
            Ok(Err(ReadError::Eof | ReadError::StdinClosed))
            | Err(RecvTimeoutError::Disconnected) => {
                let status = self.exit_status();
                Err(ProbeError::Exited {
                    status,
                    when: format!("before answering the {request} request"),
                    stderr: self.tail(),
                })
            }
            Err(RecvTimeoutError::Timeout) if self.stdin_closed() => {
                self.stop();
                Err(ProbeError::StdinClosed {
                    request: request.into(),
                    stderr: self.tail(),
                })
            }
            Err(RecvTimeoutError::Timeout) => {
                self.stop();
                Err(ProbeError::Timeout {
                    request: request.into(),
                    seconds: self.timeout.as_secs().max(1),
                    stderr: self.tail(),
                })
            }
        }
    }

    /// Whether nothing reads the program's stdin any more: the write end of a pipe polls as an
    /// error once its read end is closed (a request written before that sits unread).
    fn stdin_closed(&self) -> bool {
        if self.writer.is_none() {
            return false;
        }
        let mut p = libc::pollfd {
            fd: self.stdin_fd,
            events: 0,
            revents: 0,
        };
        // SAFETY: polling one descriptor the writer thread keeps open, without waiting.
        let n = unsafe { libc::poll(&mut p, 1, 0) };
        n == 1 && p.revents & libc::POLLERR != 0
    }

    /// Whether the program has ended (it may take a moment after closing its pipes).
    fn exited(&mut self) -> bool {
        for _ in 0..20 {
            if matches!(self.child.try_wait(), Ok(Some(_))) {
                return true;
            }
            thread::sleep(Duration::from_millis(5));
        }
        false
    }

    fn stop(&mut self) {
        self.writer.take();
        self.kill_group();
        let _ = self.child.wait();
    }

    /// Kills the program and everything in its process group.
    fn kill_group(&mut self) {
        #[cfg(unix)]
        {
            if let Ok(pid) = i32::try_from(self.child.id()) {
                // SAFETY: kill(2) with a negative pid signals the process group we created.
                unsafe {
                    libc::kill(-pid, libc::SIGKILL);
                }
            }
        }
        let _ = self.child.kill();
    }

    /// The exit status, waiting a moment for the process to be reaped.
    fn exit_status(&mut self) -> String {
        let start = Instant::now();
        while start.elapsed() < Duration::from_secs(2) {
            if let Ok(Some(s)) = self.child.try_wait() {
                return match s.code() {
                    Some(c) => format!("exited with status {c}"),
                    None => format!("was ended by a signal ({s})"),
                };
            }
            thread::sleep(Duration::from_millis(10));
        }
        self.stop();
        "closed its stdout without exiting (so plumb stopped it)".into()
    }
}

impl Drop for Program {
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            self.kill_group();
            let _ = self.child.wait();
        }
    }
}

/// The checks of a hello reply: the protocol version, the dtype, the tensors (exactly `expected`
/// when given), the optional sample shapes.
fn hello_reply(h: &Value, expected: Option<&[TensorSpec]>) -> Result<Hello, ProbeError> {
    match h.get("protocol").and_then(Value::as_u64) {
        Some(p) if p == PROTOCOL as u64 => {}
        other => {
            return Err(ProbeError::Version {
                theirs: other.map_or_else(|| "(none given)".to_string(), |p| p.to_string()),
                ours: PROTOCOL,
            });
        }
    }
    let dtype = h
        .get("dtype")
        .and_then(Value::as_str)
        .unwrap_or("")
        .to_string();
    if dtype != "f64" && dtype != "f32" {
        return Err(malformed(
            "hello",
            format!(
                "`dtype` must be \"f64\" or \"f32\", not {}",
                h.get("dtype").unwrap_or(&Value::Null)
            ),
        ));
    }
    let tensors = specs(h, "hello")?;
    if let Some(e) = expected
        && tensors != e
    {
        return Err(ProbeError::Mismatch(format!(
            "the program declares the tensors {}, but the description expects {}; name and shape them as the description's layout does, or use --blackbox for a model the description cannot express",
            list(&tensors),
            list(e)
        )));
    }
    let sample = |key: &str| -> Result<Option<Vec<usize>>, ProbeError> {
        let Some(v) = h.get(key) else {
            return Ok(None);
        };
        let shape: Option<Vec<usize>> = v.get("shape").and_then(Value::as_array).and_then(|s| {
            s.iter()
                .map(|d| d.as_u64().and_then(|d| usize::try_from(d).ok()))
                .filter(|d| d.is_none_or(|d| (1..=1 << 20).contains(&d)))
                .collect()
        });
        match shape {
            Some(s) if !s.is_empty() => Ok(Some(s)),
            _ => Err(malformed(
                "hello",
                format!(
                    "`{key}` must be {{\"shape\": [sizes ≥ 1]}}, the shape of one sample, not {v}"
                ),
            )),
        }
    };
    let input_gradient = match h.get("input_gradient") {
        None | Some(Value::Bool(false)) => false,
        Some(Value::Bool(true)) => true,
        Some(v) => {
            return Err(malformed(
                "hello",
                format!("`input_gradient` must be true or false, not {v}"),
            ));
        }
    };
    Ok(Hello {
        input_gradient,
        name: h
            .get("name")
            .and_then(Value::as_str)
            .unwrap_or("")
            .to_string(),
        dtype,
        tensors,
        x: sample("x")?,
        y: sample("y")?,
    })
}

/// The checks of a gradient reply: a finite loss, the tensors it names, finite values.
fn gradient_reply(r: &Message) -> Result<Gradient, ProbeError> {
    let loss = finite_loss(&r.header, "gradient")?;
    let specs = specs(&r.header, "gradient")?;
    let mut out = Vec::with_capacity(specs.len());
    let mut at = 0;
    for s in specs {
        let n = s.len();
        let Some(data) = r.payload.get(at..at + n).map(<[f64]>::to_vec) else {
            return Err(malformed(
                "gradient",
                format!(
                    "its payload of {} values is shorter than its tensors",
                    r.payload.len()
                ),
            ));
        };
        at += n;
        if let Some((k, v)) = data.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            let mut index = vec![0; s.shape.len()];
            let mut rest = k;
            for (i, &d) in s.shape.iter().enumerate().rev() {
                index[i] = rest % d.max(1);
                rest /= d.max(1);
            }
            return Err(ProbeError::NonFinite {
                what: "gradient".into(),
                value: *v,
                place: format!("at {index:?} of `{}`", s.name),
            });
        }
        out.push((s, data));
    }
    Ok((loss, out))
}

/// The checks of a losses reply: one finite loss per perturbation asked for.
fn losses_reply(r: Message, count: usize) -> Result<Vec<f64>, ProbeError> {
    if r.payload.len() != count {
        return Err(malformed(
            "losses",
            format!("{} losses for {count} perturbations", r.payload.len()),
        ));
    }
    if let Some((k, v)) = r.payload.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(ProbeError::NonFinite {
            what: "loss".into(),
            value: *v,
            place: format!("at perturbation {k}"),
        });
    }
    Ok(r.payload)
}

/// A framed reply as the answer to `request`: an error reply said as such, else of type `reply`.
fn accept(m: Message, request: &str, reply: &str) -> Result<Message, ProbeError> {
    let kind = m.header.get("type").and_then(Value::as_str).unwrap_or("");
    if kind == "error" {
        let message = m
            .header
            .get("message")
            .and_then(Value::as_str)
            .unwrap_or("(no message)");
        return Err(ProbeError::Remote {
            request: request.into(),
            message: message.into(),
        });
    }
    if kind != reply {
        return Err(malformed(
            request,
            format!("a reply of type `{kind}`, expected `{reply}`"),
        ));
    }
    Ok(m)
}

fn malformed(request: &str, what: String) -> ProbeError {
    ProbeError::Malformed {
        request: request.into(),
        what,
    }
}

fn push_f64(out: &mut Vec<u8>, data: &[f64]) {
    out.reserve(data.len() * 8);
    for v in data {
        out.extend_from_slice(&v.to_le_bytes());
    }
}

fn finite_loss(h: &Value, request: &str) -> Result<f64, ProbeError> {
    let v = h
        .get("loss")
        .and_then(Value::as_f64)
        .ok_or_else(|| malformed(request, "no number `loss`".into()))?;
    if !v.is_finite() {
        return Err(ProbeError::NonFinite {
            what: "loss".into(),
            value: v,
            place: String::new(),
        });
    }
    Ok(v)
}

fn specs(h: &Value, request: &str) -> Result<Vec<TensorSpec>, ProbeError> {
    let Some(list) = h.get("tensors").and_then(Value::as_array) else {
        return Err(malformed(request, "no list `tensors`".into()));
    };
    list.iter()
        .map(|t| {
            let name = t.get("name").and_then(Value::as_str);
            let shape: Option<Vec<usize>> =
                t.get("shape").and_then(Value::as_array).and_then(|s| {
                    s.iter()
                        .map(|d| d.as_u64().and_then(|d| usize::try_from(d).ok()))
                        .collect()
                });
            let size = shape
                .as_ref()
                .and_then(|s| s.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d as u64)));
            match (name, shape, size) {
                (Some(_), Some(_), Some(n)) if n > MAX_VALUES => Err(malformed(
                    request,
                    format!(
                        "a tensor of {n} values, more than the {MAX_VALUES} plumb will hold: {t}"
                    ),
                )),
                (_, Some(_), None) => Err(malformed(
                    request,
                    format!("a tensor too large to hold: {t}"),
                )),
                (Some(n), Some(s), Some(_)) => Ok(TensorSpec {
                    name: n.to_string(),
                    shape: s,
                }),
                _ => Err(malformed(
                    request,
                    format!("a tensor without a name and a shape: {t}"),
                )),
            }
        })
        .collect()
}

fn list(t: &[TensorSpec]) -> String {
    let items: Vec<String> = t
        .iter()
        .map(|s| format!("{} {:?}", s.name, s.shape))
        .collect();
    format!("[{}]", items.join(", "))
}

/// Frames a program's stdout into replies and hands each to `each`, until the stream ends or
/// breaks (the error is then the last item) or `each` returns false. `limit` is read before each
/// payload: the most float64 values the reply to the current request may announce. A payload is
/// held as it arrives, never allocated ahead at its announced size.
fn read_replies<R: Read>(
    stdout: R,
    limit: &AtomicU64,
    mut each: impl FnMut(Result<Message, ReadError>) -> bool,
) {
    let mut r = BufReader::new(stdout);
    loop {
        let mut line = Vec::new();
        match (&mut r).take(MAX_LINE).read_until(b'\n', &mut line) {
            Ok(0) => {
                each(Err(ReadError::Eof));
                return;
            }
            Ok(n) if line.last() != Some(&b'\n') => {
                let e = if n as u64 >= MAX_LINE {
                    ReadError::Garbage(format!(
                        "a line of more than {MAX_LINE} bytes: {}",
                        shorten(&line)
                    ))
                } else {
                    ReadError::Cut(shorten(&line))
                };
                each(Err(e));
                return;
            }
            Ok(_) => {}
            Err(_) => {
                each(Err(ReadError::Eof));
                return;
            }
        }
        let header: Value = match serde_json::from_slice(&line) {
            Ok(v @ Value::Object(_)) if v.get("type").is_some_and(Value::is_string) => v,
            _ => {
                // JSON has no NaN or Infinity; some writers (Python's json) emit them anyway.
                let text = String::from_utf8_lossy(&line);
                let nonfinite =
                    text.starts_with('{') && ["NaN", "Infinity"].iter().any(|t| text.contains(t));
                let e = if nonfinite {
                    ReadError::NonFinite(shorten(&line))
                } else {
                    ReadError::Garbage(shorten(&line))
                };
                each(Err(e));
                return;
            }
        };
        let count = match payload_values(&header) {
            Ok(n) => n,
            Err(what) => {
                each(Err(ReadError::Malformed(what)));
                return;
            }
        };
        let allowed = limit.load(Ordering::SeqCst);
        if count > allowed {
            each(Err(ReadError::Malformed(format!(
                "it announces {count} float64 values, but the request calls for {allowed}"
            ))));
            return;
        }
        let want = count * 8;
        let mut bytes = Vec::with_capacity(want.min(1 << 20) as usize);
        if !matches!((&mut r).take(want).read_to_end(&mut bytes), Ok(n) if n as u64 == want) {
            each(Err(ReadError::Malformed(format!(
                "its payload of {count} float64 values is cut short"
            ))));
            return;
        }
        let payload = bytes
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
            .collect();
        if !each(Ok(Message { header, payload })) {
            return;
        }
    }
}

/// The reply checks a request makes, for the fuzz target (fuzz/fuzz_targets/protocol.rs) and
/// the tests that replay its corpus: `bytes[0]` picks the request, `bytes[1]` is the most values
/// its reply may carry (the declared parameters or the perturbations asked for), the rest is
/// what the program wrote. Every framed reply goes through the request's checks; the number of
/// replies accepted, or the first error in words.
pub fn fuzz_replies(bytes: &[u8]) -> Result<usize, String> {
    let [pick, limit, stdout @ ..] = bytes else {
        return Err("too short".into());
    };
    let request = ["hello", "load", "loss", "gradient", "losses"][*pick as usize % 5];
    let count = usize::from(*limit);
    let limit = AtomicU64::new(u64::from(*limit));
    let (mut accepted, mut refused) = (0, None);
    read_replies(stdout, &limit, |m| {
        let checked = match m {
            Err(ReadError::Eof) => return false,
            Err(e) => Err(format!("{e:?}")),
            Ok(m) => accept(
                m,
                request,
                if request == "load" { "ready" } else { request },
            )
            .and_then(|m| match request {
                "hello" => hello_reply(&m.header, None).map(|_| ()),
                "loss" => finite_loss(&m.header, request).map(|_| ()),
                "gradient" => gradient_reply(&m).map(|_| ()),
                "losses" => losses_reply(m, count).map(|_| ()),
                _ => Ok(()),
            })
            .map_err(|e| e.to_string()),
        };
        match checked {
            Ok(()) => accepted += 1,
            Err(e) => refused = Some(e),
        }
        refused.is_none()
    });
    refused.map_or(Ok(accepted), Err)
}

/// How many float64 values follow a header, refusing counts beyond what plumb will hold.
fn payload_values(h: &Value) -> Result<u64, String> {
    let n = match h.get("type").and_then(Value::as_str) {
        Some("gradient") => {
            let mut total: u64 = 0;
            for t in h
                .get("tensors")
                .and_then(Value::as_array)
                .into_iter()
                .flatten()
            {
                let dims = t
                    .get("shape")
                    .and_then(Value::as_array)
                    .ok_or("a tensor without a shape")?;
                let mut n: u64 = 1;
                for d in dims {
                    let d = d
                        .as_u64()
                        .ok_or("a shape that is not a list of whole numbers")?;
                    n = n.checked_mul(d).ok_or("a shape too large to hold")?;
                }
                total = total.checked_add(n).ok_or("shapes too large to hold")?;
            }
            total
        }
        Some("losses") => h
            .get("count")
            .and_then(Value::as_u64)
            .ok_or("no whole number `count`")?,
        _ => 0,
    };
    if n > MAX_VALUES {
        return Err(format!(
            "it announces {n} float64 values, more than the {MAX_VALUES} plumb will take"
        ));
    }
    Ok(n)
}

fn shorten(line: &[u8]) -> String {
    let text = String::from_utf8_lossy(line);
    let text = text.trim_end();
    if text.chars().count() > 120 {
        format!("{}…", text.chars().take(120).collect::<String>())
    } else {
        text.to_string()
    }
}
