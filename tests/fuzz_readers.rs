//! A mutation fuzzer for the readers that take outside input: label and prediction files
//! (CSV and JSON Lines), the policy parsers (answer rules, schedules, metrics, interval
//! methods, whole policies), and the export reader. Each target starts from valid samples and
//! applies random byte flips, insertions, deletions, duplications and splices; every input must
//! give `Ok` or an error, never a panic.
//!
//! The `column` target also checks the streaming reader against two others on every input: the
//! row-table reader (same rows, lines and values, or the same error) and the `csv` crate's own
//! record reader, the reference for how CSV fields split (same ids, in the same order).
//!
//! CI runs a short pass of each target (`every_reader_survives_a_short_fuzz`). Long runs:
//! `scripts/fuzz.sh [SECONDS]` (default 600 per target), which runs the ignored
//! `fuzz_for_a_while` with `FUZZ_SECONDS` and `FUZZ_TARGET`.

use std::io::Write;
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::time::{Duration, Instant};

use holdout_ledger::audit::export::Export;
use holdout_ledger::engine::{HoldoutPolicy, PolicyInput, TargetDecl};
use holdout_ledger::files::{Format, TableSpec, read_column, read_table};
use holdout_ledger::metric::Metric;
use holdout_ledger::stats::interval::Method;
use holdout_ledger::stats::rules::Rule;
use holdout_ledger::stats::schedule::Schedule;

struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        let x = self.0;
        (x ^ (x >> 29)).wrapping_mul(0xbf58476d1ce4e5b9) >> 11
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
}

const INTERESTING: &[&[u8]] = &[
    b"",
    b",",
    b"\"",
    b"\n",
    b"\r\n",
    b"\0",
    b"NaN",
    b"inf",
    b"-1",
    b"1e308",
    b"1e-400",
    b"{",
    b"}",
    b"[",
    b"]",
    b":",
    b"\xff\xfe",
    b"\xe2\x80\xae",
    b"id",
    b"prediction",
    b"label",
    b"0.5",
    b"99999999999999999999",
    b"ok",
    b"\t",
];

fn mutate(rng: &mut Rng, samples: &[Vec<u8>]) -> Vec<u8> {
    let mut v = samples[rng.below(samples.len())].clone();
    for _ in 0..=rng.below(8) {
        let at = rng.below(v.len() + 1);
        match rng.below(6) {
            0 if !v.is_empty() => {
                let i = at.min(v.len() - 1);
                v[i] ^= 1 << rng.below(8);
            }
            1 => {
                let s = INTERESTING[rng.below(INTERESTING.len())];
                v.splice(at..at, s.iter().copied());
            }
            2 if !v.is_empty() => {
                let end = (at + rng.below(16)).min(v.len());
                v.drain(at.min(end)..end);
            }
            3 if !v.is_empty() => {
                let start = rng.below(v.len());
                let end = (start + rng.below(64)).min(v.len());
                let piece = v[start..end].to_vec();
                v.splice(at..at, piece);
            }
            4 => {
                let other = &samples[rng.below(samples.len())];
                let cut = rng.below(other.len() + 1);
                v.truncate(at);
                v.extend_from_slice(&other[cut..]);
            }
            _ => v.push(rng.next() as u8),
        }
    }
    v
}

type Target = fn(&[u8], &std::path::Path);

fn table(bytes: &[u8], dir: &std::path::Path) {
    for name in ["in.csv", "in.jsonl"] {
        let path = dir.join(name);
        std::fs::File::create(&path)
            .and_then(|mut f| f.write_all(bytes))
            .expect("write the input");
        let spec = TableSpec::new("id", ["prediction"]);
        if let Ok(t) = read_table(&path, &spec) {
            assert!(t.len() <= bytes.len(), "more rows than bytes");
        }
        let _ = read_table(&path, &TableSpec::all_columns("id"));
    }
}

/// The ids of a CSV file as the `csv` crate reads its records (the reference): blank records
/// skipped, the first other one the header, fields trimmed; `None` when it has no `id` column
/// or a row of the wrong length.
fn reference_ids(bytes: &[u8]) -> Option<Vec<String>> {
    let mut records = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(bytes)
        .into_records()
        .filter_map(Result::ok)
        .filter(|r| !r.iter().all(|f| f.trim().is_empty()));
    let header = records.next()?;
    let id = header
        .iter()
        .position(|h| h.trim_start_matches('\u{feff}').trim() == "id")?;
    records
        .map(|r| (r.len() == header.len()).then(|| r[id].trim().to_string()))
        .collect()
}

fn column(bytes: &[u8], dir: &std::path::Path) {
    for name in ["in.csv", "in.jsonl"] {
        let path = dir.join(name);
        std::fs::File::create(&path)
            .and_then(|mut f| f.write_all(bytes))
            .expect("write the input");
        let spec = TableSpec::new("id", ["prediction"]);
        let table = read_table(&path, &spec);
        let col = read_column(&path, &spec, |v, _| Ok::<_, String>(v.to_string()));
        match (&table, &col) {
            (Ok(t), Ok(c)) => {
                let ids: Vec<&str> = t.rows.iter().map(|r| r.id.as_str()).collect();
                let lines: Vec<u64> = t.rows.iter().map(|r| r.line).collect();
                let values: Vec<&str> = t.rows.iter().map(|r| r.values[0].as_str()).collect();
                assert_eq!(ids, c.ids, "ids differ");
                assert_eq!(lines, c.lines, "lines differ");
                assert_eq!(values, c.values, "values differ");
                let distinct: std::collections::HashSet<&String> = c.ids.iter().collect();
                assert_eq!(distinct.len(), c.ids.len(), "a repeated id was not found");
                if t.format == Format::Csv
                    && let Some(reference) = reference_ids(bytes)
                {
                    assert_eq!(reference, c.ids, "ids differ from the csv crate's records");
                }
                // A limit one row short stops at the last row, naming its line.
                let k = t.len() - 1;
                let short = spec.clone().max_rows(k as u64, "the test");
                match read_column(&path, &short, |v, _| Ok::<_, String>(v.to_string())) {
                    Err(holdout_ledger::error::Error::InvalidArgument { field, message }) => {
                        assert!(
                            field.ends_with(&format!(":{}", t.rows[k].line))
                                && message.contains("more rows than"),
                            "{field}: {message}"
                        );
                    }
                    other => panic!("a limit of {k} rows read {other:?}"),
                }
            }
            (Err(a), Err(b)) => assert_eq!(a.to_string(), b.to_string(), "errors differ"),
            (a, b) => panic!(
                "read_table and read_column disagree: {:?} / {:?}",
                a.as_ref().map(|t| t.len()),
                b.as_ref().map(|c| c.len())
            ),
        }
    }
}

fn parsers(bytes: &[u8], _: &std::path::Path) {
    let s = String::from_utf8_lossy(bytes);
    let _ = s.parse::<Rule>();
    let _ = s.parse::<Schedule>();
    let _ = s.parse::<Metric>();
    let _ = s.parse::<Method>();
    // A whole policy with the text in each free-form field and numbers derived from it.
    let n = bytes
        .iter()
        .fold(0u64, |a, &b| a.wrapping_mul(31).wrapping_add(b as u64));
    let num = [
        f64::NAN,
        f64::INFINITY,
        -1.0,
        0.0,
        1e-300,
        0.05,
        0.5,
        1.0,
        7.0,
    ][(n % 9) as usize];
    for field in 0..5 {
        let mut input = PolicyInput {
            delta: if field == 4 { num } else { 0.05 },
            tolerance: if field == 4 { num } else { 0.1 },
            ranking_share: if field == 4 { num } else { 0.0 },
            ..PolicyInput::default()
        };
        match field {
            0 => input.schedule = s.to_string(),
            1 => input.answers = s.to_string(),
            2 => input.shares = s.to_string(),
            3 => input.closes_at = s.to_string(),
            _ => input.sharing = s.to_string(),
        }
        let target = TargetDecl {
            name: "y".into(),
            column: "label".into(),
            metric: "error".parse().unwrap(),
            method: String::new(),
            classes: vec!["0".into(), "1".into()],
        };
        let _ = HoldoutPolicy::build(&input, vec![target], 1 + n % 5000);
    }
}

fn export(bytes: &[u8], _: &std::path::Path) {
    let _ = Export::parse("fuzz.jsonl", bytes);
}

fn samples(name: &str) -> Vec<Vec<u8>> {
    let fixtures = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/ledgers");
    match name {
        "table" | "column" => vec![
            b"id,prediction\nr1,0.5\nr2,0.25\n".to_vec(),
            b"id,prediction,extra\n\"r,1\",ok,\"a \"\"quoted\"\" cell\"\n".to_vec(),
            b"{\"id\":\"r1\",\"prediction\":0.5}\n{\"id\":\"r2\",\"prediction\":\"ok\"}\n".to_vec(),
            b"\xef\xbb\xbfid;prediction\r\nr1;1\r\n".to_vec(),
        ],
        "parsers" => [
            "rounded:0.01",
            "threshold:0.2",
            "ladder:0.01",
            "best-of:4",
            "sealed:0.01",
            "series",
            "even:10",
            "error",
            "abs_error:100",
            "brier",
            "exact",
            "kl",
            "hoeffding",
            "roster:a,b:0.2",
            "on-arrival",
            "2026-06-30T12:00:00Z",
            "isolated",
        ]
        .iter()
        .map(|s| s.as_bytes().to_vec())
        .collect(),
        _ => {
            let text = std::fs::read(fixtures.join("v0.1.0.export.jsonl")).expect("fixture");
            // Whole fixtures are long: fuzz their first lines, and the whole thing sometimes.
            let head: Vec<u8> = text
                .split(|&b| b == b'\n')
                .take(4)
                .collect::<Vec<_>>()
                .join(&b'\n');
            vec![head, text]
        }
    }
}

/// Runs `target` on mutated samples for `budget`; returns the number of inputs tried. Panics
/// (with the input, escaped) on the first input that makes a reader panic.
fn fuzz(name: &str, target: Target, budget: Duration, seed: u64) -> u64 {
    let dir = tempfile::tempdir().unwrap();
    let samples = samples(name);
    let mut rng = Rng(seed);
    let started = Instant::now();
    let mut tried = 0u64;
    while started.elapsed() < budget {
        let input = mutate(&mut rng, &samples);
        if catch_unwind(AssertUnwindSafe(|| target(&input, dir.path()))).is_err() {
            panic!(
                "{name}: a reader panicked on {:?}",
                String::from_utf8_lossy(&input)
            );
        }
        tried += 1;
    }
    tried
}

const TARGETS: &[(&str, Target)] = &[
    ("table", table),
    ("column", column),
    ("parsers", parsers),
    ("export", export),
];

#[test]
fn every_reader_survives_a_short_fuzz() {
    for (i, (name, target)) in TARGETS.iter().enumerate() {
        let tried = fuzz(name, *target, Duration::from_secs(3), 1 + i as u64);
        assert!(tried > 10, "{name}: only {tried} inputs in 3 s");
    }
}

#[test]
#[ignore = "long fuzzing runs: scripts/fuzz.sh"]
fn fuzz_for_a_while() {
    let secs: u64 = std::env::var("FUZZ_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(600);
    let only = std::env::var("FUZZ_TARGET").ok();
    let seed = std::env::var("FUZZ_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(2026);
    for (name, target) in TARGETS {
        if only.as_deref().is_some_and(|o| o != *name) {
            continue;
        }
        let tried = fuzz(name, *target, Duration::from_secs(secs), seed);
        eprintln!("fuzz {name}: {tried} inputs in {secs} s, no panic");
    }
}
