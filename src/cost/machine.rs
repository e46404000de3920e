//! A calibration of this machine: measured once (well under a second), stored as JSON by
//! the caller (the command line keeps it in the user's cache directory), valid for the CPU
//! it names.

use crate::kernel::Kernel;
use crate::program::{steps, Builder, Program, Step};
use crate::{Error, Result};
use ndarray::Array2;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::hint::black_box;
use std::time::Instant;

/// Version of the profile's fields; a stored profile of another version is measured again.
pub const PROFILE_VERSION: u32 = 3;

/// Time per flop and per transcendental call of one step kind (nanoseconds).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Rate {
    /// Nanoseconds per flop.
    pub flop_ns: f64,
    /// Nanoseconds per sin/cos/exp call.
    pub transcendental_ns: f64,
}

/// What this machine does per unit of work.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MachineProfile {
    /// [`PROFILE_VERSION`] when measured.
    pub version: u32,
    /// The CPU's model name (from the operating system), to tell whether a stored profile
    /// belongs to this machine.
    pub cpu: String,
    /// Worker threads of the batched paths.
    pub threads: usize,
    /// Data and unified cache sizes the system reports, smallest level first (bytes).
    pub cache_bytes: Vec<u64>,
    /// Streaming-read bandwidth measured at working-set sizes: `[bytes, GB/s]`, ascending.
    pub bandwidth_gbps: Vec<[f64; 2]>,
    /// Fixed cost of one single-row prediction call (ns).
    pub call_ns: f64,
    /// Fixed cost of one program step (ns).
    pub step_ns: f64,
    /// Per step kind; kinds not measured use `scale`'s rate.
    pub rates: BTreeMap<String, Rate>,
    /// Matrix-product rate of one thread (flops per ns), used by the batched paths.
    pub gemm_flops_per_ns: f64,
    /// How long the calibration took (ms).
    pub measure_ms: f64,
}

/// The CPU's model name as the system reports it (`unknown` where it cannot be read).
pub fn cpu_name() -> String {
    std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|v| v.trim().to_string())
        })
        .unwrap_or_else(|| format!("unknown {}", std::env::consts::ARCH))
}

fn cache_sizes() -> Vec<u64> {
    let mut out = Vec::new();
    for i in 0..8 {
        let dir = format!("/sys/devices/system/cpu/cpu0/cache/index{i}");
        let Ok(kind) = std::fs::read_to_string(format!("{dir}/type")) else {
            break;
        };
        if kind.trim() == "Instruction" {
            continue;
        }
        let Ok(size) = std::fs::read_to_string(format!("{dir}/size")) else {
            continue;
        };
        let s = size.trim();
        let (num, mul) = match s.chars().last() {
            Some('K') => (&s[..s.len() - 1], 1u64 << 10),
            Some('M') => (&s[..s.len() - 1], 1 << 20),
            Some('G') => (&s[..s.len() - 1], 1 << 30),
            _ => (s, 1),
        };
        if let Ok(n) = num.parse::<u64>() {
            out.push(n * mul);
        }
    }
    out.sort_unstable();
    out
}

/// Median wall time of `f` in nanoseconds over `reps` calls after a few warm-up calls.
fn time_ns(reps: usize, mut f: impl FnMut()) -> f64 {
    for _ in 0..reps.div_ceil(10).max(3) {
        f();
    }
    let mut t: Vec<f64> = (0..reps)
        .map(|_| {
            let t0 = Instant::now();
            f();
            t0.elapsed().as_nanos() as f64
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[t.len() / 2]
}

/// Sum of a buffer with eight independent accumulators (so the loop is limited by loads,
/// not by the latency of one addition chain).
fn stream_sum(v: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    for c in v.chunks_exact(8) {
        for (a, x) in acc.iter_mut().zip(c) {
            *a += x;
        }
    }
    acc.iter().sum()
}

fn read_bandwidth(bytes: usize) -> f64 {
    let n = (bytes / 8).max(64);
    let v: Vec<f64> = (0..n).map(|i| (i % 7) as f64).collect();
    // Enough passes for about 8 MB of reads per timing (at least 3 passes).
    let passes = (1usize << 20).div_ceil(n).max(3);
    let reps = if bytes > 1 << 26 { 3 } else { 7 };
    let mut best = f64::INFINITY;
    for _ in 0..reps {
        let t0 = Instant::now();
        for _ in 0..passes {
            black_box(stream_sum(black_box(&v)));
        }
        best = best.min(t0.elapsed().as_secs_f64());
    }
    (passes * n * 8) as f64 / best / 1e9
}

fn one_step(input: usize, step: impl Into<Step>) -> Program {
    let mut b = Builder::new(input);
    let v = b.push(step, &[Builder::INPUT]).expect("calibration step");
    b.finish(v)
}

fn chain(input: usize, n: usize) -> Program {
    let mut b = Builder::new(input);
    let mut v = Builder::INPUT;
    for _ in 0..n {
        v = b
            .push(steps::ConstScale::new(1.0).expect("scale"), &[v])
            .expect("calibration step");
    }
    b.finish(v)
}

/// Time of one `apply_one` call of `p` (ns).
fn run_ns(p: &Program, reps: usize) -> f64 {
    let x: Vec<f64> = (0..p.input_dim())
        .map(|i| (i as f64 * 0.37).sin())
        .collect();
    time_ns(reps, || {
        black_box(p.apply_one(black_box(&x)));
    })
}

impl MachineProfile {
    /// Measures this machine (about a quarter of a second on a 2-core machine).
    pub fn measure(threads: usize) -> Result<MachineProfile> {
        let start = Instant::now();
        let mut bandwidth = Vec::new();
        for kb in [16usize, 256, 2048, 8192, 32768, 131072] {
            bandwidth.push([(kb * 1024) as f64, read_bandwidth(kb * 1024)]);
        }
        // Fixed costs: a chain of 1 and of 9 trivial steps on one value.
        let t1 = run_ns(&chain(1, 1), 2000);
        let t9 = run_ns(&chain(1, 9), 2000);
        let step_ns = ((t9 - t1) / 8.0).max(1.0);
        let call_ns = (t1 - step_ns).max(1.0);
        let base = call_ns + step_ns;
        let mut rates = BTreeMap::new();
        let per = |p: &Program, reps: usize| (run_ns(p, reps) - base).max(0.5);
        let err = |e: Error| e.context("machine calibration");
        // Arithmetic-only kinds: time per flop on widths that stay in the first cache level.
        let elementwise: Vec<(&str, Program)> = vec![
            (
                "scale",
                one_step(1024, steps::Scale::new(vec![0.5; 1024]).map_err(err)?),
            ),
            (
                "signs",
                one_step(1024, steps::Signs::new(vec![1; 1024]).map_err(err)?),
            ),
            ("wht", one_step(1024, steps::Wht::new(1024).map_err(err)?)),
            ("relu", one_step(1024, steps::Relu)),
            (
                "dense",
                one_step(
                    128,
                    steps::Dense::new(Array2::from_elem((128, 128), 0.01)).map_err(err)?,
                ),
            ),
        ];
        for (name, p) in &elementwise {
            let flops = p.cost().flops.max(1) as f64;
            rates.insert(
                name.to_string(),
                Rate {
                    flop_ns: per(p, 400) / flops,
                    transcendental_ns: 0.0,
                },
            );
        }
        // Transcendental-only kinds.
        let trig: Vec<(&str, Program)> = vec![
            (
                "cos_sin",
                one_step(512, steps::CosSin::new(1.0).map_err(err)?),
            ),
            (
                "cos_phase",
                one_step(512, steps::CosPhase::new(vec![0.1; 512], 1.0).map_err(err)?),
            ),
        ];
        for (name, p) in &trig {
            let t = p.cost().transcendental.max(1) as f64;
            rates.insert(
                name.to_string(),
                Rate {
                    flop_ns: 0.0,
                    transcendental_ns: per(p, 400) / t,
                },
            );
        }
        // Kernel blocks: two shapes separate the per-flop and the per-exp time.
        let k: Kernel = "gaussian(gamma=0.01)".parse().expect("kernel");
        let kb = |d: usize| -> Result<(f64, f64, f64)> {
            let l = Array2::from_shape_fn((128, d), |(i, j)| ((i * d + j) as f64 * 0.01).sin());
            let p = one_step(d, steps::KernelBlock::new(k.clone(), l).map_err(err)?);
            let c = p.cost();
            Ok((per(&p, 400), c.flops as f64, c.transcendental as f64))
        };
        let (ta, fa, ea) = kb(2)?;
        let (tb, fb, eb) = kb(96)?;
        // t = a·flops + e·exp, both shapes with the same number of exps.
        let a = ((tb - ta) / (fb - fa)).max(1e-4);
        let e = ((ta - a * fa) / ea).max(0.0);
        let _ = eb;
        rates.insert(
            "kernel_block".into(),
            Rate {
                flop_ns: a,
                transcendental_ns: e,
            },
        );
        // A linear head (one row through a `D × k` matrix), as compiled models run it.
        for (name, k) in [("head", 4usize), ("head_wide", 32)] {
            let dd = 512;
            let w: Vec<f64> = (0..dd * k).map(|i| (i % 13) as f64 * 0.1).collect();
            let z: Vec<f64> = (0..dd).map(|i| (i as f64).sin()).collect();
            let t = time_ns(400, || {
                let mut out = vec![0.0; k];
                crate::linalg::add_weighted_rows(black_box(&z), black_box(&w), &mut out);
                black_box(out);
            });
            rates.insert(
                name.into(),
                Rate {
                    flop_ns: t / (2 * dd * k) as f64,
                    transcendental_ns: 0.0,
                },
            );
        }
        // The batched paths' matrix product (one thread).
        let n = 192;
        let ma = Array2::from_shape_fn((n, n), |(i, j)| ((i + 2 * j) % 11) as f64);
        let tg = time_ns(9, || {
            black_box(crate::linalg::ab_seq(ma.view(), ma.view()));
        });
        let gemm = 2.0 * (n * n * n) as f64 / tg;
        Ok(MachineProfile {
            version: PROFILE_VERSION,
            cpu: cpu_name(),
            threads: threads.max(1),
            cache_bytes: cache_sizes(),
            bandwidth_gbps: bandwidth,
            call_ns,
            step_ns,
            rates,
            gemm_flops_per_ns: gemm,
            measure_ms: start.elapsed().as_secs_f64() * 1e3,
        })
    }

    /// A fixed, unmeasured profile (for examples and tests that need no real figures).
    pub fn nominal() -> MachineProfile {
        let r = |f: f64, t: f64| Rate {
            flop_ns: f,
            transcendental_ns: t,
        };
        MachineProfile {
            version: PROFILE_VERSION,
            cpu: "nominal".into(),
            threads: 1,
            cache_bytes: vec![32 << 10, 1 << 20, 16 << 20],
            bandwidth_gbps: vec![[32768.0, 100.0], [1048576.0, 50.0], [1e9, 10.0]],
            call_ns: 100.0,
            step_ns: 20.0,
            rates: [
                ("scale".to_string(), r(0.3, 0.0)),
                ("dense".to_string(), r(0.1, 0.0)),
                ("cos_sin".to_string(), r(0.0, 5.0)),
                ("kernel_block".to_string(), r(0.1, 5.0)),
            ]
            .into_iter()
            .collect(),
            gemm_flops_per_ns: 10.0,
            measure_ms: 0.0,
        }
    }

    /// The rate of a step kind (`scale`'s for kinds not measured).
    pub fn rate(&self, kind: &str) -> Rate {
        self.rates
            .get(kind)
            .or_else(|| self.rates.get("scale"))
            .copied()
            .unwrap_or(Rate {
                flop_ns: 0.5,
                transcendental_ns: 10.0,
            })
    }

    /// Streaming bandwidth (bytes per ns) for a working set of `bytes`: interpolated
    /// between the measured sizes on log-log axes (the smallest and largest sizes' figures
    /// outside them).
    pub fn bandwidth_bytes_per_ns(&self, bytes: u64) -> f64 {
        let b = self.bandwidth_gbps.as_slice();
        let x = (bytes.max(1)) as f64;
        match b {
            [] => 10.0,
            [first, ..] if x <= first[0] => first[1],
            [.., last] if x >= last[0] => last[1],
            _ => {
                let i = b.iter().position(|p| p[0] >= x).unwrap_or(b.len() - 1);
                let ([x0, g0], [x1, g1]) = (b[i - 1], b[i]);
                let t = (x / x0).ln() / (x1 / x0).ln();
                (g0.ln() + t * (g1.ln() - g0.ln())).exp()
            }
        }
    }

    /// True when a stored profile can be used on this machine (same version and CPU).
    pub fn fits_this_machine(&self) -> bool {
        self.version == PROFILE_VERSION && self.cpu == cpu_name()
    }

    /// The profile as JSON text.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("a profile serialises")
    }

    /// Reads a profile from JSON text.
    pub fn from_json(s: &str, src: &str) -> Result<MachineProfile> {
        let p: MachineProfile = serde_json::from_str(s)
            .map_err(|e| Error::file(format!("{src}: not a machine profile: {e}")))?;
        let finite = p.call_ns.is_finite()
            && p.step_ns.is_finite()
            && p.gemm_flops_per_ns > 0.0
            && !p.bandwidth_gbps.is_empty()
            && p.bandwidth_gbps
                .iter()
                .all(|b| b[1] > 0.0 && b[1].is_finite());
        if !finite {
            return Err(Error::file(format!(
                "{src}: the machine profile holds a non-positive or non-finite figure; delete it to measure again"
            )));
        }
        Ok(p)
    }
}
