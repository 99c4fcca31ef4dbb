//! tanh, eˣ, ln and the logistic function for f64 and f32, written out so that they are cheap enough to run a few thousand times per perturbed loss.
//!
//! A finite-difference check of a tanh network spends most of its time in tanh: moving one weight
//! of layer j changes every pre-activation of layer j + 1, and each must go through tanh again;
//! the loss's log-sum-exp takes an eˣ per output. In a loop on the machine the benchmarks run
//! on, the C library's tanh takes about 8 ns a value and its exp and log 3; these take 0.7–1 ns
//! in their AVX-512 loops (f32: 0.3–0.4; benches/README.md, session 11), and stay within a few
//! ulp of the C library's (each function's doc comment says how many, and the tests measure it).
//!
//! Every slice loop is compiled three times: plainly (SSE2 on x86-64), for AVX2 and for AVX-512;
//! the widest build the CPU has is chosen at run time. All three do the same IEEE operations on
//! each value — no fused multiply-add: Rust never contracts a product and a sum into one, even
//! where the target feature allows it — so their results are bit for bit the same, and those of
//! the function called on one value (tested in each module): a report does not depend on the
//! CPU it was made on.
//!
//! f64 in [`f64`](mod@self::f64), f32 in [`f32`](mod@self::f32), computed in f32 throughout (no
//! widening), so that a check in f32 costs less than one in f64.

mod f32;
mod f64;

pub use self::f32::{
    exp_f32, exp_in_place_f32, ln_f32, ln_in_place_f32, sigmoid_in_place_f32, tanh_f32,
    tanh_in_place_f32,
};
pub use self::f64::{exp, exp_in_place, ln, ln_in_place, sigmoid_in_place, tanh, tanh_in_place};

/// A slice loop over a function of one value (`$f`), compiled three times: plainly (`$plain`),
/// for AVX2 (`$avx2`) and for AVX-512 (`$avx512`); `$name` runs the widest the CPU has.
macro_rules! dispatched {
    ($(#[$doc:meta])* $name:ident, $plain:ident, $avx2:ident, $avx512:ident, $t:ty, $f:path) => {
        $(#[$doc])*
        pub fn $name(values: &mut [$t]) {
            #[cfg(target_arch = "x86_64")]
            {
                if std::arch::is_x86_feature_detected!("avx512f") {
                    // SAFETY: the CPU has just been found to support AVX-512F, all the function
                    // requires.
                    unsafe { $avx512(values) };
                    return;
                }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has just been found to support AVX2, all the function
                    // requires.
                    unsafe { $avx2(values) };
                    return;
                }
            }
            $plain(values);
        }

        #[inline(always)]
        fn $plain(values: &mut [$t]) {
            for v in values {
                *v = $f(*v);
            }
        }

        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2")]
        unsafe fn $avx2(values: &mut [$t]) {
            $plain(values);
        }

        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx512f")]
        unsafe fn $avx512(values: &mut [$t]) {
            $plain(values);
        }
    };
}
use dispatched;

/// A slice loop by name, for the tests.
#[cfg(test)]
type NamedLoop<'a, T> = (&'a str, fn(&mut [T]));

/// For the tests of both modules: `f` on one value, its plain loop, its dispatched loop and each
/// build the CPU has give the same bits, at every length up to 40 (the vector loops' tails) and
/// on the whole of `values`.
#[cfg(test)]
fn same_bits_every_way<T: Copy + PartialEq + std::fmt::Debug, B: PartialEq + std::fmt::Debug>(
    values: &[T],
    bits: fn(T) -> B,
    f: fn(T) -> T,
    loops: &[NamedLoop<T>],
) {
    let one_by_one: Vec<B> = values.iter().map(|&v| bits(f(v))).collect();
    for len in (0..=40).chain([values.len()]) {
        let start = values.len() - len;
        for (name, run) in loops {
            let mut out = values[start..].to_vec();
            run(&mut out);
            let out: Vec<B> = out.into_iter().map(bits).collect();
            assert_eq!(out, one_by_one[start..], "{name}, length {len}");
        }
    }
}

/// The builds of a dispatched loop this CPU can run, by name, for [`same_bits_every_way`].
#[cfg(test)]
macro_rules! builds {
    ($plain:ident, $dispatched:ident, $avx2:ident, $avx512:ident, $t:ty) => {{
        let mut loops: Vec<super::super::NamedLoop<$t>> =
            vec![("plain", $plain), ("dispatched", $dispatched)];
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2.
                loops.push(("avx2", |v| unsafe { $avx2(v) }));
            }
            if std::arch::is_x86_feature_detected!("avx512f") {
                // SAFETY: the CPU supports AVX-512F.
                loops.push(("avx512", |v| unsafe { $avx512(v) }));
            }
        }
        loops
    }};
}
#[cfg(test)]
use builds;
