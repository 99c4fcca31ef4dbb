//! Finite-difference methods, their step rules, and the error each can explain.
//!
//! Numerical Recipes (Press et al., 2nd ed., §5.7): a forward difference errs by ~h·f″ (truncation)
//! plus ~ε_f·|f|/h (round-off), best at h ≈ √ε·x_c; a central difference errs by ~h²·f‴ plus the
//! same round-off, best at h ≈ ∛ε·x_c. The five-point stencil
//! [−f(x+2h) + 8f(x+h) − 8f(x−h) + f(x−2h)] / 12h errs by (h⁴/30)·f⁽⁵⁾, best near ε^(1/5)·x_c.
//! Ridders' method (Adv. Eng. Software 4:75–76, 1982; NR's `dfridr`) extrapolates central
//! differences of shrinking step to h → 0 and estimates its own error from the tableau. The complex
//! step (Squire & Trapp, SIAM Review 40:110–112, 1998) takes Im f(x + ih)/h: no subtraction, so no
//! round-off from cancellation, and h can be tiny.
//!
//! Each estimate carries an error bound: the truncation error estimated from two step sizes (or the
//! tableau), plus the round-off the evaluation noise causes. A disagreement larger than the bound is
//! more than the method can explain.

use std::fmt;

use num_complex::Complex;
use plumb_engine::Scalar;

/// A finite-difference method.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Method {
    Central,
    Forward,
    FivePoint,
    Richardson,
    ComplexStep,
}

/// One derivative estimate with the error the method itself can account for.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Estimate {
    pub value: f64,
    /// The largest |error| the method can explain at this step (absolute).
    pub error: f64,
    /// The step the estimate used (the smallest, for Ridders).
    pub step: f64,
    /// Whether a ReLU-like unit changed side within the stencil.
    pub crossed: bool,
    /// Whether central differences settled it at ±h alone ([`Target`]): `value` is the quotient
    /// at `step`, `error` its round-off there plus the truncation a third loss at 2h shows.
    pub one_step: bool,
}

/// What an estimate will be judged against, so that central differences can stop at ±h: the
/// analytic value, and how far from it (absolute) the quotient at ±h may lie and still settle
/// there — a tenth of the tolerance of the value judged ([`Rule::target`](crate::Rule::target)).
///
/// Why one step with a third loss, and not one step alone. The quotient at ±h is the true
/// derivative g plus a truncation error T ≈ h²·f‴/6 plus round-off R. A wrong analytic value
/// a = g + m agrees with it to `within` only when m lies within `within` of T + R: the check
/// cannot tell such a mistake from truncation, and ±h alone says nothing of T (three losses, with
/// f(0), fit a parabola, which has no third derivative). So a settle on one step also asks for
/// f(2h): the third difference f(2h) − 3f(h) + 3f(0) − f(−h) = h³·f‴ + O(h⁴) measures T, and the
/// estimate settles only when twice that, plus the round-off at h (2·noise/h), is within
/// [`ONE_STEP_BOUND`] of the tolerance too. Then |a − g| ≤ |a − d(h)| + |d(h) − g| stays below
/// the tolerance of the value, so no mistake the tolerance would call one can settle on one step
/// as a match on the estimate's own error; where T is of a mistake's size the third difference
/// shows it and the ladder decides as it always has. (The verdict then adds the analytic value's
/// own round-off allowance, `Rule::judge`: at weights far above their usual scale that allowance
/// in f32 can pass the tolerance, and a mistake within it is a match there as on any step.) Three losses instead of the ladder's four (f64) or fourteen (f32); none is wasted
/// when the settle fails, as ±h and 2h are the ladder's first points.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Target {
    pub analytic: f64,
    /// Half the width of the band around `analytic` the quotient at ±h must fall in (absolute).
    pub within: f64,
    /// The largest error bound (absolute) a settle on one step may carry.
    pub bound: f64,
}

/// The band a quotient at ±h must fall in to settle there, as a share of the tolerance of the
/// value judged (issue 14: a tenth).
pub const ONE_STEP_BAND: f64 = 0.1;

/// The largest bound (round-off at h plus the truncation the third loss shows) a settle on one
/// step may carry, as a share of the tolerance of the value judged: with the band, a settled
/// analytic value is within 0.6 of the tolerance of the true derivative.
pub const ONE_STEP_BOUND: f64 = 0.5;

/// Ridders' tableau: initial step factor, shrink factor, size, and the stop rule (NR §5.7).
const RIDDERS_START: f64 = 0.01;
const RIDDERS_SHRINK: f64 = 1.4;
const RIDDERS_SIZE: usize = 10;
const RIDDERS_SAFE: f64 = 2.0;

/// The complex step's size relative to the parameter: anything far below ε works.
const COMPLEX_STEP: f64 = 1e-20;

/// In f64, central differences start from h = 2∛ε·max(|θ|, 1) and also take 2h. The optimal
/// step is (3ε|J|/|J‴|)^(1/3) (NR §5.7); a network's loss bends slowly enough along one weight
/// that this lies above ∛ε: on six smooth architectures with Glorot and He weights (20 seeds
/// each) the largest error per coordinate was 4e-8 at ∛ε, 2e-8 at 2∛ε, and 1.2e-8 when each
/// coordinate also takes 2h where round-off dominates (crates/fd/tests/it/accuracy.rs keeps it
/// measured). In f32, ∛ε is already 5e-3: a step twice that leaves the quadratic regime on
/// networks with large weights, where the two-step bound then undercounts (a review found false
/// mismatches with weights 4× their initial scale), so f32 keeps h = ∛ε·max(|θ|, 1).
const CENTRAL_FACTOR_F64: f64 = 2.0;

/// Doublings of the step central differences may take in f32 (see [`Method::reach`]).
const F32_REACH: u32 = 6;

/// Ridders' first step in f32: ten times f64's, so that the tableau's smallest steps (h/1.4⁹)
/// stay near ∛ε rather than where f32's round-off swamps the difference.
const RIDDERS_START_F32: f64 = 0.1;

/// Machine epsilons below this are f64's (or finer).
const F64_EPSILON_LIMIT: f64 = 1e-10;

impl Method {
    pub const ALL: [Method; 5] = [
        Method::Central,
        Method::Forward,
        Method::FivePoint,
        Method::Richardson,
        Method::ComplexStep,
    ];

    pub fn name(&self) -> &'static str {
        match self {
            Method::Central => "central",
            Method::Forward => "forward",
            Method::FivePoint => "five-point",
            Method::Richardson => "richardson",
            Method::ComplexStep => "complex-step",
        }
    }

    pub fn from_name(name: &str) -> Option<Method> {
        Method::ALL.into_iter().find(|m| m.name() == name)
    }

    /// The default step for a parameter of value θ in a precision with machine epsilon ε:
    /// h = c(ε) · max(|θ|, 1), with c = 2∛ε in f64 and ∛ε in f32 (central), √ε (forward), ε^(1/5) (five-point), 0.01 as
    /// the first step of Ridders' tableau, 1e-20 for the complex step.
    pub fn default_step(&self, theta: f64, eps: f64) -> f64 {
        let scale = theta.abs().max(1.0);
        let c = match self {
            Method::Central if eps < F64_EPSILON_LIMIT => CENTRAL_FACTOR_F64 * eps.cbrt(),
            Method::Central => eps.cbrt(),
            Method::Forward => eps.sqrt(),
            Method::FivePoint => eps.powf(0.2),
            Method::Richardson if eps < F64_EPSILON_LIMIT => RIDDERS_START,
            Method::Richardson => RIDDERS_START_F32,
            Method::ComplexStep => COMPLEX_STEP,
        };
        c * scale
    }

    /// A sentence stating the step rule in a precision with machine epsilon ε, for reports.
    pub fn step_rule(&self, eps: f64) -> &'static str {
        match self {
            Method::Central if eps < F64_EPSILON_LIMIT => {
                "h = 2∛ε · max(|θ|, 1), or 2h where round-off dominates (the smaller error bound)"
            }
            Method::Central => {
                "h = ∛ε · max(|θ|, 1), or 2h, 4h … 32h where round-off dominates (the smallest error bound; never a step whose stencil crosses a kink)"
            }
            Method::Forward => "h = √ε · max(|θ|, 1)",
            Method::FivePoint => "h = ε^(1/5) · max(|θ|, 1)",
            Method::Richardson if eps < F64_EPSILON_LIMIT => {
                "Ridders' tableau from h = 0.01 · max(|θ|, 1), shrinking by 1.4"
            }
            Method::Richardson => "Ridders' tableau from h = 0.1 · max(|θ|, 1), shrinking by 1.4",
            Method::ComplexStep => "h = 1e-20 · max(|θ|, 1) on the imaginary axis",
        }
    }

    /// How many doublings of the default step central differences may move to where round-off
    /// dominates, in a precision with machine epsilon ε: one in f64 (h or 2h), six in f32 (a ladder
    /// to 64h, of which up to 32h is kept: f32's round-off is large against a trained network's
    /// small gradient; the ladder stops below the first rung whose stencil crosses a kink). Other
    /// methods ignore it.
    pub fn reach(&self, eps: f64) -> u32 {
        match self {
            Method::Central if eps < F64_EPSILON_LIMIT => 1,
            Method::Central => F32_REACH,
            _ => 0,
        }
    }

    /// Evaluations of the loss one estimate costs (besides the unperturbed loss).
    pub fn evaluations(&self) -> usize {
        match self {
            Method::Central => 2 * (F32_REACH as usize + 1),
            Method::Forward => 2,
            Method::FivePoint => 6,
            Method::Richardson => 2 * RIDDERS_SIZE,
            Method::ComplexStep => 1,
        }
    }

    /// The steps δ at which [`Method::estimate`] evaluates f for a first step h (besides f(0)), in
    /// no particular order: an outside program can then be asked for all of them in one request.
    /// Empty for the complex step, which needs complex arithmetic.
    pub fn stencil(&self, h: f64, reach: u32, round: fn(f64) -> f64) -> Vec<f64> {
        let h = round(h);
        let both = |d: f64| [d, -d];
        match self {
            Method::Central => (0..=reach.max(1))
                .map(|k| h * f64::from(1u32 << k))
                .flat_map(both)
                .collect(),
            Method::Forward => vec![h, 2.0 * h],
            Method::FivePoint => [h, 2.0 * h, 4.0 * h].into_iter().flat_map(both).collect(),
            Method::Richardson => {
                let mut out = both(h).to_vec();
                let mut hh = h;
                for _ in 1..RIDDERS_SIZE {
                    hh = round(hh / RIDDERS_SHRINK);
                    out.extend(both(hh));
                }
                out
            }
            Method::ComplexStep => Vec::new(),
        }
    }

    /// Estimates f′(0) for a real method. `f(δ)` is the loss at θ + δ with a flag for a kink
    /// crossing; `f0` is the loss at θ; `noise` the absolute round-off of one evaluation of f;
    /// `round` rounds a step to the precision f computes in, so the quotient divides by the step
    /// actually taken.
    pub fn estimate(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
    ) -> Estimate {
        self.estimate_with(f, f0, h, noise, round, 1)
    }

    /// As [`Method::estimate`], with central differences free to move up to `reach` doublings of
    /// the step (0: exactly h, for a step the user fixed with --step; see [`Method::reach`]).
    pub fn estimate_with(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
        reach: u32,
    ) -> Estimate {
        self.estimate_toward(f, f0, h, noise, round, reach, None)
    }

    /// As [`Method::estimate_with`], for an estimate that will be judged against `target`:
    /// central differences then first try to settle at ±h ([`Method::settle_one_step`]), and climb
    /// their ladder only when that fails, reusing the losses already taken. Other methods, and a
    /// fixed step (reach 0), ignore the target.
    #[allow(clippy::too_many_arguments)]
    pub fn estimate_toward(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
        reach: u32,
        target: Option<Target>,
    ) -> Estimate {
        let h = round(h);
        match (self, target) {
            (Method::Central, Some(target)) if reach > 0 => {
                let memo = Memo::new(f);
                let f = |d: f64| memo.at(d);
                self.settle_one_step(&f, f0, h, noise, round, target)
                    .unwrap_or_else(|| central_ladder(&f, h, noise, reach))
            }
            _ => self.estimate_plain(f, f0, h, noise, round, reach),
        }
    }

    /// The steps [`Method::settle_one_step`] evaluates f at (±h and 2h), for a loss asked for in
    /// batches; none for other methods.
    pub fn one_step_stencil(&self, h: f64, round: fn(f64) -> f64) -> Vec<f64> {
        let h = round(h);
        match self {
            Method::Central => vec![h, -h, 2.0 * h],
            _ => Vec::new(),
        }
    }

    /// Central differences settled at ±h alone, or None where they cannot be (see [`Target`]): the
    /// quotient at ±h must lie within `target.within` of the analytic value, no step may cross a
    /// kink, and its bound — the round-off at h, 2·noise/h, plus twice the truncation the third
    /// difference with f(2h) shows — must be at most `target.bound`. f(2h) is only asked for when
    /// the quotient already agrees.
    pub fn settle_one_step(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
        target: Target,
    ) -> Option<Estimate> {
        if *self != Method::Central {
            return None;
        }
        let h = round(h);
        let (p, cp) = f(h);
        let (m, cm) = f(-h);
        let value = (p - m) / (2.0 * h);
        // True only for numbers: a NaN anywhere fails it.
        let agrees = (value - target.analytic).abs() <= target.within;
        if cp || cm || !agrees {
            return None;
        }
        let (q, cq) = f(2.0 * h);
        if cq {
            return None;
        }
        // f(2h) − 3f(h) + 3f(0) − f(−h) = h³·f‴ + (h⁴/2)·f⁗ + …, and the quotient at ±h errs by
        // h²·f‴/6 + O(h⁴): its truncation is the third difference over 6h.
        let truncation = (q - 3.0 * p + 3.0 * f0 - m).abs() / (6.0 * h);
        // As the ladder's bound: the truncation estimate doubled for safety, plus round-off.
        let error = 2.0 * truncation + 2.0 * noise / h;
        (error <= target.bound).then_some(Estimate {
            value,
            error,
            step: h,
            crossed: false,
            one_step: true,
        })
    }

    /// Central differences on ±h and 2h alone, whatever they say, for losses whose round-off
    /// bound is their own ([`crate::Inside::differences`]): the quotient at ±h, with the error
    /// [`Method::settle_one_step`] would give it; `None` where a step crosses a kink or the
    /// method is not central. Its caller takes it when that error is within the target's bound,
    /// agreeing or not: an estimate that precise decides a disagreement as well (a mistake is
    /// then a mismatch at once rather than a question for the ladder of whole losses, whose
    /// round-off is far coarser).
    pub fn one_step_estimate(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
    ) -> Option<Estimate> {
        if *self != Method::Central {
            return None;
        }
        let h = round(h);
        let (p, cp) = f(h);
        let (m, cm) = f(-h);
        let (q, cq) = f(2.0 * h);
        if cp || cm || cq {
            return None;
        }
        let truncation = (q - 3.0 * p + 3.0 * f0 - m).abs() / (6.0 * h);
        let error = 2.0 * truncation + 2.0 * noise / h;
        // A NaN anywhere is no estimate.
        let value = (p - m) / (2.0 * h);
        (value.is_finite() && error.is_finite()).then_some(Estimate {
            value,
            error,
            step: h,
            crossed: false,
            one_step: true,
        })
    }

    /// Every method without a target.
    fn estimate_plain(
        &self,
        f: &dyn Fn(f64) -> (f64, bool),
        f0: f64,
        h: f64,
        noise: f64,
        round: fn(f64) -> f64,
        reach: u32,
    ) -> Estimate {
        match self {
            Method::Central => central_ladder(f, h, noise, reach),
            Method::Forward => {
                let (p1, c1) = f(h);
                let (p2, c2) = f(2.0 * h);
                let d1 = (p1 - f0) / h;
                let d2 = (p2 - f0) / (2.0 * h);
                Estimate {
                    value: d1,
                    error: 2.0 * (d2 - d1).abs() + 4.0 * noise / h,
                    step: h,
                    crossed: c1 || c2,
                    one_step: false,
                }
            }
            Method::FivePoint => {
                let at = |k: f64| f(k * h);
                let (p1, c1) = at(1.0);
                let (m1, c2) = at(-1.0);
                let (p2, c3) = at(2.0);
                let (m2, c4) = at(-2.0);
                let (p4, c5) = at(4.0);
                let (m4, c6) = at(-4.0);
                let d = (8.0 * (p1 - m1) - (p2 - m2)) / (12.0 * h);
                let d2 = (8.0 * (p2 - m2) - (p4 - m4)) / (24.0 * h);
                Estimate {
                    value: d,
                    error: 2.0 * (d2 - d).abs() / 15.0 + 3.0 * noise / h,
                    step: h,
                    crossed: c1 || c2 || c3 || c4 || c5 || c6,
                    one_step: false,
                }
            }
            Method::Richardson => ridders(f, h, noise, round),
            Method::ComplexStep => panic!("the complex step is estimated with `complex_estimate`"),
        }
    }
}

/// The complex-step estimate from g(h) = Im f(θ + ih): value g(h)/h; its own error is round-off in
/// the derivative propagation, a few ε of the value.
pub fn complex_estimate(g: &dyn Fn(f64) -> (f64, bool), h: f64, eps: f64) -> Estimate {
    let (im, crossed) = g(h);
    let value = im / h;
    Estimate {
        value,
        error: 4.0 * eps * value.abs(),
        step: h,
        crossed,
        one_step: false,
    }
}

/// Central differences at h, 2h, … 2^reach·h, keeping the quotient with the smallest error bound
/// among the rungs that agree with every smaller step within both bounds. Truncation falls as
/// h²: |d(2h) − d(h)|/3 estimates d(h)'s truncation, four times that d(2h)'s; where both
/// neighbours give an estimate the larger is taken, doubled for safety. Round-off adds 2·noise/h.
/// Past the quadratic regime two neighbouring pairs can still agree by accident — a loss that
/// rises and then flattens along a direction gives nearly equal quotients at 16h, 32h and 64h,
/// all far from f′(0) — so a rung whose interval misses a smaller step's is never kept. The
/// ladder stops below the first rung whose stencil crosses a kink; with fewer than two clean
/// rungs the estimate is `crossed`.
fn central_ladder(f: &dyn Fn(f64) -> (f64, bool), h: f64, noise: f64, reach: u32) -> Estimate {
    let rungs = reach.max(1);
    let mut d: Vec<f64> = Vec::with_capacity(rungs as usize + 1);
    for k in 0..=rungs {
        let hk = h * f64::from(1u32 << k);
        let (p, cp) = f(hk);
        let (m, cm) = f(-hk);
        if cp || cm {
            if d.len() < 2 {
                // Crossed too soon to judge: the value is reported, not trusted.
                let value = d.first().copied().unwrap_or((p - m) / (2.0 * hk));
                return Estimate {
                    value,
                    error: f64::INFINITY,
                    step: h,
                    crossed: true,
                    one_step: false,
                };
            }
            break;
        }
        d.push((p - m) / (2.0 * hk));
    }
    // With reach 0 (a fixed step) only h itself may be kept; 2h served to estimate its error. On a
    // longer ladder the top rung is never kept: its error rests on one pair alone, and far from
    // the quadratic regime one pair can agree by accident.
    let last = match (reach, d.len()) {
        (0, _) => 0,
        (_, 2) => 1,
        (_, n) => n - 2,
    };
    let bounds: Vec<f64> = (0..=last)
        .map(|k| {
            let hk = h * f64::from(1u32 << k);
            let above = d.get(k + 1).map_or(0.0, |u| (u - d[k]).abs() / 3.0);
            let below = if k > 0 {
                4.0 * (d[k] - d[k - 1]).abs() / 3.0
            } else {
                0.0
            };
            2.0 * above.max(below) + 2.0 * noise / hk
        })
        .collect();
    let mut best = Estimate {
        value: d[0],
        error: f64::INFINITY,
        step: h,
        crossed: false,
        one_step: false,
    };
    for k in 0..=last {
        let hk = h * f64::from(1u32 << k);
        let bound = bounds[k];
        // A rung must agree, within both bounds, with every smaller step: truncation only grows
        // with the step, so a rung that contradicts a lower one has left the quadratic regime,
        // where two neighbouring pairs can agree by accident (a loss that flattens past a bump).
        let consistent = (0..k).all(|j| (d[k] - d[j]).abs() <= bound + bounds[j]);
        if consistent && bound < best.error {
            best = Estimate {
                value: d[k],
                error: bound,
                step: hk,
                crossed: false,
                one_step: false,
            };
        }
    }
    best
}

/// f with every value it gave kept, so that the ladder after a failed settle on one step takes
/// no loss twice.
struct Memo<'a> {
    f: &'a dyn Fn(f64) -> (f64, bool),
    seen: std::cell::RefCell<Vec<(u64, (f64, bool))>>,
}

impl<'a> Memo<'a> {
    fn new(f: &'a dyn Fn(f64) -> (f64, bool)) -> Memo<'a> {
        Memo {
            f,
            seen: std::cell::RefCell::new(Vec::with_capacity(16)),
        }
    }

    fn at(&self, d: f64) -> (f64, bool) {
        let key = d.to_bits();
        if let Some(&(_, v)) = self.seen.borrow().iter().find(|(k, _)| *k == key) {
            return v;
        }
        let v = (self.f)(d);
        self.seen.borrow_mut().push((key, v));
        v
    }
}

/// The points [`smooth_across`] needs, besides f(0): ±s, ±2s, ±4s.
pub fn second_difference_steps(s: f64) -> [f64; 6] {
    [s, -s, 2.0 * s, -2.0 * s, 4.0 * s, -4.0 * s]
}

/// Whether f looks smooth across ±4s, from its second differences: on a smooth function
/// S(k) = f(ks) − 2f(0) + f(−ks) grows as k², so S(k)/(ks)² (the curvature) is the same at k = 1,
/// 2, 4 up to O(f⁗s²); a kink at offset u inside the stencil adds c·(ks − u) to S(k), which moves
/// those three curvatures apart by at least a third of the largest of them, wherever u lies. They
/// count as apart when they differ by more than a tenth of the largest, plus what the noise of
/// the evaluations can explain (`noise` each: 4·noise/s² in the first curvature, a quarter and a
/// sixteenth of that in the others).
pub fn smooth_across(f: &dyn Fn(f64) -> f64, f0: f64, s: f64, noise: f64) -> bool {
    let q = |k: f64| (f(k * s) - 2.0 * f0 + f(-k * s)) / (k * s).powi(2);
    let curv = [q(1.0), q(2.0), q(4.0)];
    if curv.iter().any(|c| !c.is_finite()) {
        return false;
    }
    let top = curv.iter().fold(0.0f64, |m, c| m.max(c.abs()));
    let spread = curv.iter().fold(f64::NEG_INFINITY, |m, &c| m.max(c))
        - curv.iter().fold(f64::INFINITY, |m, &c| m.min(c));
    spread <= 0.1 * top + 5.0 * noise / (s * s)
}

/// Ridders' extrapolation of central differences (NR §5.7, `dfridr`), with its error estimate.
fn ridders(f: &dyn Fn(f64) -> (f64, bool), h: f64, noise: f64, round: fn(f64) -> f64) -> Estimate {
    let n = RIDDERS_SIZE;
    let con2 = RIDDERS_SHRINK * RIDDERS_SHRINK;
    let mut a = vec![vec![0.0f64; n]; n];
    let mut crossed = false;
    let mut central = |hh: f64| {
        let (p, c1) = f(hh);
        let (m, c2) = f(-hh);
        crossed |= c1 || c2;
        (p - m) / (2.0 * hh)
    };
    let mut hh = h;
    a[0][0] = central(hh);
    let mut best = a[0][0];
    let mut err = f64::INFINITY;
    let mut best_step = hh;
    for i in 1..n {
        hh = round(hh / RIDDERS_SHRINK);
        a[0][i] = central(hh);
        let mut fac = con2;
        for j in 1..=i {
            a[j][i] = (a[j - 1][i] * fac - a[j - 1][i - 1]) / (fac - 1.0);
            fac *= con2;
            let errt = (a[j][i] - a[j - 1][i])
                .abs()
                .max((a[j][i] - a[j - 1][i - 1]).abs());
            if errt <= err {
                err = errt;
                best = a[j][i];
                best_step = hh;
            }
        }
        // Stop where the tableau grows worse, or where round-off of the next, smaller step
        // would already exceed the error reached (in f32 it soon does).
        if (a[i][i] - a[i - 1][i - 1]).abs() >= RIDDERS_SAFE * err
            || noise * RIDDERS_SHRINK / hh > err
        {
            break;
        }
    }
    Estimate {
        value: best,
        // The tableau's estimate is the smallest difference it saw, which can be optimistic:
        // four times it, never below twice the round-off of the smallest step the value used
        // (extrapolation weighs differences by up to about two).
        error: (4.0 * err).max(2.0 * noise / best_step),
        step: best_step,
        crossed,
        one_step: false,
    }
}

/// A complex number type the complex step can run in.
pub(crate) trait ComplexScalar: Scalar {
    /// i·h.
    fn imaginary(h: f64) -> Self;
    fn im(self) -> f64;
}

impl ComplexScalar for Complex<f64> {
    fn imaginary(h: f64) -> Self {
        Complex::new(0.0, h)
    }
    fn im(self) -> f64 {
        self.im
    }
}

impl ComplexScalar for Complex<f32> {
    fn imaginary(h: f64) -> Self {
        Complex::new(0.0, h as f32)
    }
    fn im(self) -> f64 {
        self.im as f64
    }
}

/// A step as the precision S stores it, so a quotient divides by the step actually taken.
pub(crate) fn round_to<S: Scalar>(h: f64) -> f64 {
    S::from_f64(h).re()
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ident(h: f64) -> f64 {
        h
    }

    // Numerical Recipes, 2nd ed., §5.7 [pub]: forward differences of exp at 0 in IEEE f64 give
    // 1.000050001667141 (h = 1e-4), 0.99999999392252903 (h = 1e-8), 1.000088900582341 (h = 1e-12).
    #[test]
    #[allow(clippy::excessive_precision)] // the digits as published
    fn forward_difference_of_exp_reproduces_the_published_digits() {
        let f = |d: f64| ((d).exp(), false);
        for (h, want) in [
            (1e-4, 1.000050001667141),
            (1e-8, 0.99999999392252903),
            (1e-12, 1.000088900582341),
        ] {
            let e = Method::Forward.estimate(&f, 1.0, h, 0.0, ident);
            assert_eq!(e.value, want, "h = {h}");
        }
    }

    // x·e^(−x) at 0.5 [pub: calculus]: derivative (1 − x)e^(−x) = 0.5·e^(−0.5) = 0.3032653298563167.
    #[test]
    fn every_method_reaches_its_accuracy_on_a_smooth_function() {
        let x0 = 0.5f64;
        let f = |d: f64| {
            let x = x0 + d;
            (x * (-x).exp(), false)
        };
        let exact = 0.3032653298563167;
        let eps = f64::EPSILON;
        let f0 = f(0.0).0;
        let noise = eps * f0;
        for (method, tol) in [
            (Method::Central, 1e-10),
            (Method::Forward, 1e-7),
            (Method::FivePoint, 1e-12),
            (Method::Richardson, 1e-13),
        ] {
            let h = method.default_step(x0, eps);
            let e = method.estimate(&f, f0, h, noise, ident);
            let err = (e.value - exact).abs();
            assert!(err < tol, "{method}: error {err:e}");
            // The error bound covers the actual error, and is not absurdly loose.
            assert!(
                err <= e.error,
                "{method}: error {err:e} above its bound {:e}",
                e.error
            );
            assert!(e.error < 1e3 * tol, "{method}: bound {:e}", e.error);
        }
    }

    // f(t) = t·exp(−(t/s)²) [calculus: f′(0) = 1]: its central quotient is exp(−(t/s)²), which
    // falls from 0.91 at t = h to almost 0 from 8h on, with s = h/0.3. The rungs 16h … 64h agree
    // with each other to 1e-10 and would carry the smallest bound; they contradict the h rung, so
    // the ladder keeps h, whose bound covers its error.
    #[test]
    fn the_ladder_keeps_no_rung_past_a_bump() {
        let h = 0.01;
        let s = h / 0.3;
        let f = |t: f64| (t * (-(t / s).powi(2)).exp(), false);
        let e = Method::Central.estimate_with(&f, 0.0, h, 1e-16, ident, 6);
        assert_eq!(e.step, h, "{e:?}");
        assert!((e.value - 1.0).abs() <= e.error, "{e:?}");
        assert!((e.value - (-0.09f64).exp()).abs() < 1e-12, "{e:?}");
    }

    // [pub: Squire & Trapp, SIAM Review 40(1):110–112, 1998; the value computed with mpmath to 20
    // digits]:
    // f(x) = eˣ / √(sin³x + cos³x) has f′(1.5) = 4.05342789389862; the complex step in f64 reaches it
    // for h from 1e-8 down to 1e-100, while central differences are off by ~5e-10 at h = 1e-5.
    #[test]
    fn complex_step_on_the_literature_test_function() {
        use num_complex::Complex64;
        let f = |x: Complex64| x.exp() / (x.sin().powu(3) + x.cos().powu(3)).sqrt();
        let exact = 4.05342789389862;
        for h in [1e-8, 1e-20, 1e-50, 1e-100] {
            let g = |h: f64| (f(Complex64::new(1.5, h)).im, false);
            let e = complex_estimate(&g, h, f64::EPSILON);
            assert!((e.value - exact).abs() < 1e-13, "h = {h}: {}", e.value);
        }
        let real = |d: f64| (f(Complex64::new(1.5 + d, 0.0)).re, false);
        let c = Method::Central.estimate(&real, real(0.0).0, 1e-5, 0.0, ident);
        let off = (c.value - exact).abs();
        assert!(
            off > 1e-10 && off < 2e-9,
            "central at 1e-5 is off by {off:e}"
        );
    }
}
