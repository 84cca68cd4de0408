//! The scoring kernel against numpy and a plain C loop, in one run on one machine.
//!
//! `metric::score` of a 0-1 loss over `HOLDOUT_SCORE_ROWS` rows (default 10,000,000): labels
//! packed as one byte per row (class indices, how the daemon keeps them), predictions as
//! 32-bit class indices (how a submission arrives). The same two arrays are written to a
//! scratch directory and scored by
//! - numpy: `(p != y).mean()` over the same dtypes (uint32 and uint8), read with `np.fromfile`;
//! - C: the plain counting loop over the same types, compiled here with `cc -O3`.
//!
//! Each side times its own loop in its own process (median of `HOLDOUT_SCORE_RUNS` runs, default
//! 31, after one warm-up; reading the arrays excluded) and prints the error count, which must
//! agree. Then the two ratios: numpy / Rust (target at least 2) and Rust / C (target at most 1.2).
//!
//! Environment: `HOLDOUT_SCORE_ROWS`, `HOLDOUT_SCORE_RUNS`, `BENCH_PYTHON` (a python with
//! numpy; default `target/bench-venv/bin/python` if present, else `python3`), `CC` (default
//! `cc`). A side that cannot run (no numpy, no compiler) is reported and skipped.

use std::io::Write;
use std::process::Command;
use std::time::Instant;

use holdout_ledger::metric::{Labels, Metric, Predictions, score};

fn env_or(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

const C_SOURCE: &str = r#"
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

static double now_ms(void) {
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec * 1e3 + t.tv_nsec / 1e6;
}

static void *slurp(const char *path, size_t *len) {
    FILE *f = fopen(path, "rb");
    if (!f) { perror(path); exit(1); }
    fseek(f, 0, SEEK_END);
    *len = (size_t)ftell(f);
    fseek(f, 0, SEEK_SET);
    void *buf = malloc(*len);
    if (fread(buf, 1, *len, f) != *len) { perror(path); exit(1); }
    fclose(f);
    return buf;
}

/* The plain loop: count the rows where label and prediction differ. */
static uint64_t count_errors(const uint8_t *y, const uint32_t *p, size_t n) {
    uint64_t errors = 0;
    for (size_t i = 0; i < n; i++) errors += (uint32_t)y[i] != p[i];
    return errors;
}

static int cmp(const void *a, const void *b) {
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv) {
    size_t ny, np;
    const uint8_t *y = slurp(argv[1], &ny);
    const uint32_t *p = slurp(argv[2], &np);
    int runs = atoi(argv[3]);
    size_t n = ny;
    volatile uint64_t sink = count_errors(y, p, n);
    double *ms = malloc(sizeof(double) * runs);
    uint64_t errors = 0;
    for (int r = 0; r < runs; r++) {
        double t0 = now_ms();
        errors = count_errors(y, p, n);
        ms[r] = now_ms() - t0;
        sink += errors;
    }
    qsort(ms, runs, sizeof(double), cmp);
    printf("%.4f %llu\n", ms[runs / 2], (unsigned long long)errors);
    return 0;
}
"#;

const NUMPY_SOURCE: &str = r#"
import sys, time
import numpy as np
y = np.fromfile(sys.argv[1], dtype=np.uint8)
p = np.fromfile(sys.argv[2], dtype=np.uint32)
runs = int(sys.argv[3])
(p != y).mean()
ms = []
for _ in range(runs):
    t0 = time.perf_counter()
    err = (p != y).mean()
    ms.append((time.perf_counter() - t0) * 1e3)
ms.sort()
print(f"{ms[len(ms) // 2]:.4f} {int(round(err * len(y)))} numpy {np.__version__}")
"#;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let rows = env_or("HOLDOUT_SCORE_ROWS", 10_000_000);
    let runs = env_or("HOLDOUT_SCORE_RUNS", 31).max(1);
    // Invented data: three classes, about 30 % of predictions wrong (a fixed LCG).
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut next = || {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (state >> 33) as u32
    };
    let y: Vec<u8> = (0..rows).map(|_| (next() % 3) as u8).collect();
    let p: Vec<u32> = y
        .iter()
        .map(|&c| {
            if next() % 10 < 3 {
                (u32::from(c) + 1 + next() % 2) % 3
            } else {
                u32::from(c)
            }
        })
        .collect();

    let labels = Labels::Classes(y.clone());
    let preds = Predictions::Classes(p.clone());
    let mut ms = Vec::with_capacity(runs);
    let mut errors = score(&Metric::Error, &labels, &preds)?.errors;
    for _ in 0..runs {
        let t0 = Instant::now();
        let loss = score(
            &Metric::Error,
            std::hint::black_box(&labels),
            std::hint::black_box(&preds),
        )?;
        ms.push(t0.elapsed().as_secs_f64() * 1e3);
        errors = loss.errors;
    }
    let rust_ms = median(ms);
    let errors = errors.unwrap_or(0);
    println!("rows {rows}, runs {runs} (medians)");
    println!("rust  metric::score          {rust_ms:8.3} ms  errors {errors}");

    let dir = tempfile::tempdir()?;
    let (yp, pp) = (dir.path().join("y.u8"), dir.path().join("p.u32"));
    std::fs::write(&yp, &y)?;
    let mut f = std::io::BufWriter::new(std::fs::File::create(&pp)?);
    for v in &p {
        f.write_all(&v.to_ne_bytes())?;
    }
    f.flush()?;
    drop(f);
    drop((y, p));

    let run_side = |cmd: &mut Command, name: &str| -> Option<f64> {
        match cmd.output() {
            Ok(out) if out.status.success() => {
                let text = String::from_utf8_lossy(&out.stdout);
                let mut parts = text.split_whitespace();
                let t: f64 = parts.next()?.parse().ok()?;
                let e: u64 = parts.next()?.parse().ok()?;
                let rest: Vec<&str> = parts.collect();
                println!("{name:<29}{t:8.3} ms  errors {e} {}", rest.join(" "));
                assert_eq!(
                    e, errors,
                    "{name} counts {e} errors, metric::score {errors}"
                );
                Some(t)
            }
            Ok(out) => {
                println!(
                    "{name}: skipped ({})",
                    String::from_utf8_lossy(&out.stderr).trim()
                );
                None
            }
            Err(e) => {
                println!("{name}: skipped ({e})");
                None
            }
        }
    };

    let python = std::env::var("BENCH_PYTHON").unwrap_or_else(|_| {
        let venv = concat!(env!("CARGO_MANIFEST_DIR"), "/target/bench-venv/bin/python");
        if std::path::Path::new(venv).exists() {
            venv.to_string()
        } else {
            "python3".to_string()
        }
    });
    let script = dir.path().join("score.py");
    std::fs::write(&script, NUMPY_SOURCE)?;
    let numpy_ms = run_side(
        Command::new(&python)
            .arg(&script)
            .arg(&yp)
            .arg(&pp)
            .arg(runs.to_string()),
        "numpy (p != y).mean()",
    );

    let cc = std::env::var("CC").unwrap_or_else(|_| "cc".into());
    let src = dir.path().join("score.c");
    let exe = dir.path().join("score-c");
    std::fs::write(&src, C_SOURCE)?;
    let compiled = Command::new(&cc)
        .args(["-O3", "-o"])
        .arg(&exe)
        .arg(&src)
        .status()
        .is_ok_and(|s| s.success());
    let c_ms = if compiled {
        run_side(
            Command::new(&exe).arg(&yp).arg(&pp).arg(runs.to_string()),
            "C loop, cc -O3",
        )
    } else {
        println!("C loop: skipped ({cc} did not compile it)");
        None
    };

    if let Some(n) = numpy_ms {
        println!(
            "numpy / rust = {:.2}  (target at least 2: rust is that many times faster)",
            n / rust_ms
        );
    }
    if let Some(c) = c_ms {
        println!("rust / C     = {:.2}  (target at most 1.2)", rust_ms / c);
    }
    Ok(())
}
