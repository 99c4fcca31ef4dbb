//! The finite-difference check of a gradient, coordinate by coordinate and along random directions.
//!
//! Verdict per coordinate: `mismatch` only when |a − n| exceeds the error the method can explain
//! (its bound) *and* the relative error |a − n| / max(|a|, |n|, floor) exceeds the precision's
//! tolerance. The floor is 10% of the largest |a| in the same tensor (of ‖g‖ over the direction's
//! span, for a direction): entries near zero are judged against their tensor's scale rather than
//! their own, since round-off leaves every entry an absolute error of about the same size;
//! `unreliable` when a unit changes side of a kink, or of a break in a derivative the method's
//! bound relies on, inside the stencil even after retrying with steps 10, 100 and 1000 times
//! smaller; `unsettled` when it is no mismatch but the bound exceeds [`SETTLE`] of the value judged
//! (a wrong value could have passed); `match` otherwise. A check whose unsettled and unreliable
//! items exceed [`UNSETTLED_SHARE`] is inconclusive ([`Settlement`]).
//!
//! Central differences at the default step are told what they will be judged against
//! ([`Rule::target`]): a coordinate or direction whose quotient at ±h already lands within a tenth
//! of the tolerance of its value, with a bound (round-off at h, and the truncation a third loss at
//! 2h shows) within half of it, settles there on three losses ([`Target`] says why the third).
//!
//! Tolerances [practice, no formal source]: 1e-6 in f64 and 1e-3 in f32, well above the best
//! accuracy of a central difference in each (ε^(2/3): about 4e-11 and 2e-5, Numerical Recipes
//! §5.7) and well below the error a mistake in a backward pass makes. The tolerance alone never
//! makes a mismatch: the method's own error bound at that coordinate must be exceeded too.

use thiserror::Error;

use crate::external::Entry;
use crate::method::{ONE_STEP_BAND, ONE_STEP_BOUND, Target};
use crate::{Method, Sample};

/// The arithmetic the check runs the engine in.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Precision {
    F64,
    F32,
}

impl Precision {
    pub fn name(&self) -> &'static str {
        match self {
            Precision::F64 => "f64",
            Precision::F32 => "f32",
        }
    }

    pub fn epsilon(&self) -> f64 {
        match self {
            Precision::F64 => f64::EPSILON,
            Precision::F32 => f32::EPSILON as f64,
        }
    }

    /// The relative error above which a coordinate can be called wrong (see the module doc).
    pub fn tolerance(&self) -> f64 {
        match self {
            Precision::F64 => 1e-6,
            Precision::F32 => 1e-3,
        }
    }
}

/// What to check and how.
#[derive(Clone, Debug)]
pub struct CheckConfig {
    pub method: Method,
    /// A fixed step for every coordinate instead of the scaled default.
    pub step: Option<f64>,
    pub precision: Precision,
    /// `None`: [`Sample::default_for_parameters`] of the network.
    pub sample: Option<Sample>,
    /// Random directions per part (and globally); `None`: [`DEFAULT_DIRECTIONS`].
    pub directions: Option<usize>,
    pub seed: u64,
    /// Overrides the precision's relative tolerance.
    pub tolerance: Option<f64>,
    /// (k, n): check only the k-th (1-based) of n deterministic shares of the coordinates and
    /// directions, for a check split over several jobs.
    pub shard: Option<(usize, usize)>,
}

impl CheckConfig {
    pub fn new(method: Method, precision: Precision) -> CheckConfig {
        CheckConfig {
            method,
            step: None,
            precision,
            sample: None,
            directions: None,
            seed: 0,
            tolerance: None,
            shard: None,
        }
    }
}

/// One evaluation of the loss is taken to carry round-off of this many ε of |J|. The measured
/// difference between two step sizes carries the actual round-off as well; this term is the floor
/// under it for when the two happen to agree.
pub const NOISE: f64 = 4.0;

/// The round-off taken for one evaluation of a loss J in precision ε: [`NOISE`]·ε·max(|J|,
/// Σ|pieces|), `gross` the magnitude of the pieces J is summed from (0 if unknown). The check's
/// step and verdict rules, and the response's limit (a tenth of it), all read this one figure.
pub fn loss_noise(eps: f64, loss: f64, gross: f64) -> f64 {
    NOISE * eps * loss.abs().max(gross)
}

/// The share of [`loss_noise`] a loss through a response may err by at most: below it the
/// plain path's own round-off could move a verdict as much (docs/engine.md, "The response").
pub const RESPONSE_SHARE: f64 = 0.1;

/// The share of an activation's Taylor radius (`Activation::bends`) a step may move it by
/// before a disagreement found across that step is estimated again with the step counted as a
/// crossing. The ladder's truncation estimate assumes the loss near its Taylor polynomial over
/// the stencil, and its terms fall by (step/radius)² from one order to the next: at half the
/// radius a quarter, which the estimate's doubling covers.
pub const BEND_SHARE: f64 = 0.5;

/// Directions checked per part and globally when not asked otherwise.
pub const DEFAULT_DIRECTIONS: usize = 4;

/// Why a check cannot run.
#[derive(Clone, Debug, Error, PartialEq)]
pub enum CheckError {
    #[error("the step {0} is not usable: give a finite step > 0")]
    BadStep(f64),
    #[error("{0}")]
    BadSample(String),
    #[error("the batch does not fit the network: {0}")]
    BadBatch(String),
    #[error("the gradient to check does not have the network's shapes")]
    BadGradient,
    #[error("the parameters do not fit the network: {0}")]
    BadParams(String),
    /// A value the check's precision cannot hold, or a loss or gradient that is not finite
    /// there: no difference of losses can be judged (the message says which and what to do).
    #[error("{0}")]
    Unusable(String),
    /// The loss at the weights and data is not finite in the check's precision.
    #[error(
        "the loss there is {loss} in {precision}: a check needs a finite loss; look at the weights' and the data's scale (plumb audit)"
    )]
    LossNotFinite { loss: f64, precision: &'static str },
    /// A parameter past f32's range in an f32 pass: graph tensor `tensor` (named `name`), flat
    /// index `index` in its canonical shape (reports say where it is in the file).
    #[error("tensor `{name}` index {index} {}", past_f32(*.value, SCALE_HINT))]
    ParamBeyondF32 {
        tensor: usize,
        name: String,
        index: usize,
        value: f64,
    },
    /// A token id an f32 pass cannot hold exactly (f32 holds every integer up to 2²⁴ and not
    /// all above): sample and step from 0.
    #[error("sample {}, step {} {}", .sample + 1, .step + 1, token_past_f32(*.id))]
    TokenBeyondF32 { sample: usize, step: usize, id: f64 },
    /// A batch value past f32's range in an f32 pass: sample and column from 0, of x or y.
    #[error(
        "sample {}, {of} column {} {}",
        .sample + 1,
        .column + 1,
        past_f32(*.value, DATA_HINT)
    )]
    DataBeyondF32 {
        sample: usize,
        column: usize,
        of: &'static str,
        value: f64,
    },
}

/// What to do besides computing in f64 about a parameter, and about a data value, past f32's
/// range.
pub(crate) const SCALE_HINT: &str = "look at its scale (plumb audit)";
pub(crate) const DATA_HINT: &str = "scale the data";

/// What a value past f32's range holds and what to do: the words after its place, which a
/// [`CheckError`] gives in the engine's terms and a report in the user's files.
pub(crate) fn past_f32(value: f64, hint: &str) -> String {
    format!(
        "holds {value:e}, past the largest f32 value (3.4e38): run in f64 (--precision f64), or {hint}"
    )
}

/// [`past_f32`] for a token id f32 cannot hold exactly.
pub(crate) fn token_past_f32(id: f64) -> String {
    format!(
        "holds the token id {id}, which f32 cannot hold exactly (it holds every integer only up to 2^24 = 16777216): run in f64 (--precision f64)"
    )
}

/// The verdict on one coordinate or direction.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Status {
    Match,
    /// Not a mismatch, but the method's error bound exceeds [`SETTLE`] of the value judged: a
    /// wrong gradient could have passed here, so it is not called a match.
    Unsettled,
    Unreliable,
    Mismatch,
}

impl Status {
    pub fn name(&self) -> &'static str {
        match self {
            Status::Match => "match",
            Status::Unsettled => "unsettled",
            Status::Unreliable => "unreliable",
            Status::Mismatch => "mismatch",
        }
    }

    pub fn from_name(name: &str) -> Option<Status> {
        [
            Status::Match,
            Status::Unsettled,
            Status::Unreliable,
            Status::Mismatch,
        ]
        .into_iter()
        .find(|s| s.name() == name)
    }

    /// Whether the check said something definite here: a match or a mismatch.
    pub fn settled(&self) -> bool {
        matches!(self, Status::Match | Status::Mismatch)
    }
}

/// Written as its name (`"match"`, `"unsettled"`, …), as reports have always said it.
impl serde::Serialize for Status {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.name())
    }
}

impl<'de> serde::Deserialize<'de> for Status {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Status, D::Error> {
        let name = String::deserialize(d)?;
        Status::from_name(&name)
            .ok_or_else(|| serde::de::Error::custom(format!("an unknown status `{name}`")))
    }
}

/// A coordinate or direction is settled when its method's error bound is at most this fraction of
/// the value it judges, max(|a|, |n|, floor): an error of a tenth of the value would then show.
pub const SETTLE: f64 = 0.1;

/// The largest share of a tensor's checked coordinates (and, apart, of its directions, and of the
/// directions over the whole network) that may stay unsettled or unreliable for the check to
/// conclude. Above it the verdict is `inconclusive` unless something is a mismatch.
pub const UNSETTLED_SHARE: f64 = 0.25;

/// How much of a set of checked items (coordinates or directions) was settled.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Settlement {
    pub checked: usize,
    /// Unsettled or unreliable.
    pub unsettled: usize,
}

impl Settlement {
    pub fn of(statuses: impl IntoIterator<Item = Status>) -> Settlement {
        statuses
            .into_iter()
            .fold(Settlement::default(), |s, st| Settlement {
                checked: s.checked + 1,
                unsettled: s.unsettled + usize::from(!st.settled()),
            })
    }

    /// Whether at most [`UNSETTLED_SHARE`] of the items stayed unsettled.
    pub fn conclusive(&self) -> bool {
        self.unsettled as f64 <= UNSETTLED_SHARE * self.checked as f64
    }

    /// The settled share, 1 for nothing checked.
    pub fn share(&self) -> f64 {
        if self.checked == 0 {
            1.0
        } else {
            (self.checked - self.unsettled) as f64 / self.checked as f64
        }
    }
}

/// One coordinate's check, at an entry of an outside program's or the layer graph's tensors.
#[derive(Clone, Debug, PartialEq)]
pub struct CoordCheck<K = Entry> {
    pub coord: K,
    pub analytic: f64,
    pub numeric: f64,
    pub abs_error: f64,
    pub rel_error: f64,
    /// The error the method can explain here (absolute).
    pub bound: f64,
    pub step: f64,
    pub status: Status,
    /// Whether a smaller step was needed to step off a kink.
    pub retried: bool,
    /// Whether central differences settled it at ±h alone ([`Target`]).
    pub one_step: bool,
    /// Whether its estimate came from losses computed in f64 at the parameters a coarser
    /// precision holds (`Inside::widens`): its own precision's did not settle it at one step.
    pub wide: bool,
}

/// What a check covered.
#[derive(Clone, Debug, PartialEq)]
pub struct Coverage {
    pub sample: Sample,
    /// Whether the sample was the default for the network's size.
    pub default_sample: bool,
    pub directions: usize,
    pub parameters: usize,
    pub checked: usize,
    /// The one-entry losses the check took through a response of the layers above (the
    /// engine's `Response`) rather than a plain forward pass; 0 where no layer has one.
    pub responded: usize,
    /// The losses along a random direction that started from the lowest moved layer's z plus
    /// the step times its change, shared by the direction's steps, rather than that layer's
    /// pass (the engine's `Graph::forward_along`; f64 only); 0 where none did.
    pub shared: usize,
}

/// Progress: called with (done, total) as coordinates finish, from any thread.
pub type Progress<'a> = &'a (dyn Fn(usize, usize) + Sync);

/// The verdict rule (module doc): machine epsilon of the precision, the relative tolerance, and the
/// largest |entry| of the gradient.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Rule {
    pub eps: f64,
    pub tolerance: f64,
    pub scale: f64,
}

impl Rule {
    /// (abs error, rel error, bound, status) of an analytic value `a` against an estimate `n` whose
    /// method can explain `method_error`, with the relative error's `floor`.
    /// `gross` bounds the pieces `a` was summed from (see `graph_gradient_magnitude`), 0 if unknown.
    pub fn judge(
        &self,
        a: f64,
        n: f64,
        floor: f64,
        gross: f64,
        method_error: f64,
        crossed: bool,
    ) -> (f64, f64, f64, Status) {
        let e = (a - n).abs();
        // Allowance for the analytic value's own rounding: a few dozen ε of the values compared and
        // of the gradient's scale, and of the pieces it was summed from (`gross`: a − y near 1
        // for a confident network keeps ε of 1 whatever its size).
        let bound = method_error
            + 64.0 * self.eps * (a.abs().max(n.abs()) + self.scale)
            + 16.0 * self.eps * gross;
        let den = a.abs().max(n.abs()).max(floor);
        let rel = if den > 0.0 { e / den } else { 0.0 };
        let status = if crossed {
            Status::Unreliable
        } else if (e > bound && rel > self.tolerance) || !n.is_finite() || !a.is_finite() {
            Status::Mismatch
        } else if den > 0.0 && bound > SETTLE * den {
            Status::Unsettled
        } else {
            Status::Match
        };
        (e, rel, bound, status)
    }

    /// What an estimate of the analytic value `a`, judged with the relative error's `floor`, must
    /// land within to settle at ±h alone ([`Target`]).
    pub fn target(&self, a: f64, floor: f64) -> Target {
        target(self.tolerance, a, floor)
    }
}

/// The one rule for [`Target`]: the quotient at ±h within [`ONE_STEP_BAND`] of the tolerance of
/// the value judged, its bound within [`ONE_STEP_BOUND`] of it. The value judged is taken as
/// max(|a|, floor) — without the estimate's own |n|, which is not known yet, so the band is never
/// wider than the verdict's denominator allows.
fn target(tolerance: f64, a: f64, floor: f64) -> Target {
    let scale = tolerance * a.abs().max(floor);
    Target {
        analytic: a,
        within: ONE_STEP_BAND * scale,
        bound: ONE_STEP_BOUND * scale,
    }
}

/// Kink retries: steps 10, 100 and 1000 times smaller.
pub(crate) const RETRIES: [f64; 3] = [0.1, 0.01, 0.001];
