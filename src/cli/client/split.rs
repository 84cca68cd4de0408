//! `holdout split`: carving one labelled file into row-disjoint files, one per future holdout.
//!
//! Rows are shuffled with a seeded generator (splitmix64 seeding xoshiro256**, written here so
//! the output depends only on the seed and this code), within each stratum when asked, and each
//! part takes its fraction of every stratum. Parts are written in input row order.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde_json::json;

use super::show;
use crate::error::{Error, Result};
use crate::files::{self, DEFAULT_MAX_FILE_BYTES, TableSpec};

/// Slack allowed on the sum of fractions (so 0.7 + 0.3 counts as 1).
const SUM_SLACK: f64 = 1e-9;
/// Name of the file that receives rows no part takes.
pub const REST: &str = "rest";

/// Extra help for `split`.
pub const SPLIT_HELP: &str = "\
Disjoint rows are independent draws, so each part can become its own holdout with its own \
budget: for example a feedback holdout that answers during development and a final holdout \
scored once at the end. Parts of one file must not be combined into one holdout, and the daemon \
refuses a holdout whose rows overlap an existing one. Each part's holdout carries its own delta, \
so k parts hold jointly only with probability at least 1 - k * delta; to give them one total \
instead, create them as one family (holdout create --family NAME, --family-delta TOTAL on the \
first, each part's --delta its share).

Each part NAME=FRACTION is written to DIR/NAME.csv with the input's columns. Fractions must lie \
in (0, 1] and sum to at most 1; when they sum to less, the remaining rows go to DIR/rest.csv. The \
split is deterministic for a given --seed; with --stratify, every value of the column is split \
in the same fractions (see the condition printed with it).";

/// What one part's holdout guarantees jointly with the others: printed by every split.
pub const JOINT_NOTE: &str = "Each part created as its own holdout carries its own delta, so k \
parts hold jointly only with probability at least 1 - k * delta (union bound). To give them one \
total instead, create them as one family: holdout create NAME --labels PART.csv --family F \
--delta SHARE, with --family-delta TOTAL on the first member; the daemon refuses shares that \
would sum past the total.";

/// The condition under which stratified parts are used: printed whenever --stratify is.
pub const STRATIFY_CONDITION: &str = "With --stratify, the parts' class counts are tied \
together: each part takes its fraction of every value of the column (to within one row), so its \
counts follow from the whole file's instead of being drawn on their own, and the file's counts \
with one part's determine the others'. Given the counts, each part's rows are still independent \
draws within their class, so its intervals speak of the error at the part's own class mix (each \
class's error rate weighted by its share of the part, about its share of the file), not at the \
population's; for exact intervals this rests on a sum of independent errors with class-dependent \
rates being no more spread in its tails than a binomial (Hoeffding 1956). Treat each part's \
class counts as known to anyone who knows the file's.";

/// One requested part.
#[derive(Debug, Clone, PartialEq)]
pub struct Part {
    /// File stem of the part.
    pub name: String,
    /// Fraction of the rows (of every stratum) it takes.
    pub fraction: f64,
}

/// Parses `NAME=FRACTION`.
///
/// # Errors
/// A message for clap when the text is not of that form.
pub fn parse_part(s: &str) -> std::result::Result<Part, String> {
    let (name, fraction) = s
        .split_once('=')
        .ok_or_else(|| format!("expected NAME=FRACTION, got {s:?}"))?;
    let fraction: f64 = fraction
        .trim()
        .parse()
        .map_err(|_| format!("fraction {fraction:?} is not a number"))?;
    Ok(Part {
        name: name.trim().to_string(),
        fraction,
    })
}

/// `holdout split`.
#[derive(Debug, Args)]
pub struct SplitArgs {
    /// Labelled file to split (CSV with a header row, or JSON Lines).
    pub file: PathBuf,
    /// Parts NAME=FRACTION, each written to DIR/NAME.csv (`--into a=0.5 b=0.5`, or `--into`
    /// repeated).
    #[arg(long = "into", value_name = "NAME=FRACTION", required = true, num_args = 1.., value_parser = parse_part)]
    pub into: Vec<Part>,
    /// Seed of the shuffle: the same seed and file give the same parts.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Split every value of this column (the label) in the same fractions. This ties the parts'
    /// class counts together; the condition it puts on the parts' intervals is printed with
    /// the split.
    #[arg(long, value_name = "COLUMN")]
    pub stratify: Option<String>,
    /// Column of the row ids (must be unique).
    #[arg(long, default_value = "id")]
    pub id_column: String,
    /// Directory for the part files (created if missing).
    #[arg(long, default_value = ".", value_name = "DIR")]
    pub out_dir: PathBuf,
    /// Replace part files that already exist.
    #[arg(long)]
    pub force: bool,
    /// Print one JSON object describing the parts.
    #[arg(long)]
    pub json: bool,
    /// Refuse input files larger than this many bytes.
    #[arg(long, default_value_t = DEFAULT_MAX_FILE_BYTES, value_name = "BYTES")]
    pub max_file_bytes: u64,
}

/// Checks part names and fractions; returns whether a remainder is left.
///
/// # Errors
/// [`Error::InvalidArgument`] for a bad name, a duplicate, a fraction outside (0, 1], a sum
/// above 1, or a part called `rest` when a remainder needs that name.
pub fn check_parts(parts: &[Part]) -> Result<bool> {
    if parts.is_empty() {
        return Err(Error::invalid("--into", "give at least one NAME=FRACTION"));
    }
    for (i, p) in parts.iter().enumerate() {
        let ok_name = !p.name.is_empty()
            && p.name.len() <= 64
            && !p.name.starts_with('.')
            && p.name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'));
        if !ok_name {
            return Err(Error::invalid(
                "--into",
                format!(
                    "part name {:?}: use letters, digits, '-', '_' and '.' (not first), at most 64",
                    p.name
                ),
            ));
        }
        if parts[..i].iter().any(|q| q.name == p.name) {
            return Err(Error::invalid(
                "--into",
                format!("part {:?} is named twice", p.name),
            ));
        }
        if !(p.fraction > 0.0 && p.fraction <= 1.0) {
            return Err(Error::invalid(
                "--into",
                format!(
                    "fraction of {:?} must lie in (0, 1], got {}",
                    p.name, p.fraction
                ),
            ));
        }
    }
    let sum: f64 = parts.iter().map(|p| p.fraction).sum();
    if sum > 1.0 + SUM_SLACK {
        return Err(Error::invalid(
            "--into",
            format!("fractions sum to {sum}, more than 1: parts would share rows"),
        ));
    }
    let rest = sum < 1.0 - SUM_SLACK;
    if rest && parts.iter().any(|p| p.name == REST) {
        return Err(Error::invalid(
            "--into",
            "fractions sum to less than 1, so the remainder goes to rest.csv: rename the part \
             called \"rest\"",
        ));
    }
    Ok(rest)
}

/// Splits rows into parts: `strata` lists row indices per stratum; returns one sorted index list
/// per part plus a last one for the remainder. Every row lands in exactly one list, and in every
/// stratum each part gets its fraction of the rows to within one row.
pub fn assign(strata: &[Vec<usize>], fractions: &[f64], seed: u64) -> Vec<Vec<usize>> {
    let mut out = vec![Vec::new(); fractions.len() + 1];
    let mut rng = Xoshiro256::new(seed);
    let total: f64 = fractions.iter().sum();
    let mut shares = fractions.to_vec();
    shares.push(if total >= 1.0 - SUM_SLACK {
        0.0
    } else {
        1.0 - total
    });
    for stratum in strata {
        let mut rows = stratum.clone();
        rng.shuffle(&mut rows);
        let mut start = 0;
        for (j, size) in apportion(rows.len(), &shares).into_iter().enumerate() {
            out[j].extend_from_slice(&rows[start..start + size]);
            start += size;
        }
    }
    for part in &mut out {
        part.sort_unstable();
    }
    out
}

/// Largest-remainder apportionment of `m` rows to shares summing to 1: each count is its share
/// of `m` rounded down or up, the counts sum to `m`, ties go to the earlier share.
fn apportion(m: usize, shares: &[f64]) -> Vec<usize> {
    let targets: Vec<f64> = shares.iter().map(|s| s * m as f64).collect();
    let mut counts: Vec<usize> = targets.iter().map(|t| t.floor() as usize).collect();
    let assigned: usize = counts.iter().sum();
    let mut order: Vec<usize> = (0..shares.len()).collect();
    order.sort_by(|&a, &b| {
        let (fa, fb) = (
            targets[a] - targets[a].floor(),
            targets[b] - targets[b].floor(),
        );
        fb.total_cmp(&fa).then(a.cmp(&b))
    });
    for &j in order.iter().cycle().take(m.saturating_sub(assigned)) {
        counts[j] += 1;
    }
    counts
}

/// xoshiro256** seeded by splitmix64 (public-domain algorithms by Blackman and Vigna).
struct Xoshiro256 {
    s: [u64; 4],
}

impl Xoshiro256 {
    fn new(seed: u64) -> Self {
        let mut x = seed;
        let mut next = || {
            x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = x;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^ (z >> 31)
        };
        Xoshiro256 {
            s: [next(), next(), next(), next()],
        }
    }

    fn next_u64(&mut self) -> u64 {
        let result = self.s[1].wrapping_mul(5).rotate_left(7).wrapping_mul(9);
        let t = self.s[1] << 17;
        self.s[2] ^= self.s[0];
        self.s[3] ^= self.s[1];
        self.s[1] ^= self.s[2];
        self.s[0] ^= self.s[3];
        self.s[2] ^= t;
        self.s[3] = self.s[3].rotate_left(45);
        result
    }

    /// Uniform in `0..n` (n > 0), without modulo bias (rejection sampling).
    fn below(&mut self, n: u64) -> u64 {
        let zone = u64::MAX - (u64::MAX % n);
        loop {
            let x = self.next_u64();
            if x < zone {
                return x % n;
            }
        }
    }

    /// Fisher-Yates.
    fn shuffle<T>(&mut self, v: &mut [T]) {
        for i in (1..v.len()).rev() {
            let j = self.below(i as u64 + 1) as usize;
            v.swap(i, j);
        }
    }
}

/// Runs `holdout split`.
///
/// # Errors
/// Bad parts, an unreadable input, a missing stratify column, a part that would get no rows,
/// or an output file that exists (without --force).
pub fn run(args: &SplitArgs) -> anyhow::Result<ExitCode> {
    let rest = check_parts(&args.into)?;
    let spec = TableSpec::all_columns(&args.id_column).max_bytes(args.max_file_bytes);
    let table = files::read_table(&args.file, &spec)?;
    let strata: BTreeMap<String, Vec<usize>> = match &args.stratify {
        None => BTreeMap::from([(String::new(), (0..table.len()).collect())]),
        Some(col) => {
            let k = table.column_index(col).ok_or_else(|| {
                Error::invalid(
                    "--stratify",
                    format!(
                        "{} has no column {col:?}; columns: {}",
                        table.source,
                        table.columns.join(", ")
                    ),
                )
            })?;
            let mut m: BTreeMap<String, Vec<usize>> = BTreeMap::new();
            for (i, row) in table.rows.iter().enumerate() {
                m.entry(row.values[k].clone()).or_default().push(i);
            }
            m
        }
    };
    let fractions: Vec<f64> = args.into.iter().map(|p| p.fraction).collect();
    let groups: Vec<Vec<usize>> = strata.values().cloned().collect();
    let parts = assign(&groups, &fractions, args.seed);
    for (p, rows) in args.into.iter().zip(&parts) {
        if rows.is_empty() {
            return Err(Error::invalid(
                "--into",
                format!(
                    "part {:?} would get no rows ({} of {} rows); use a larger fraction",
                    p.name,
                    p.fraction,
                    table.len()
                ),
            )
            .into());
        }
    }
    let mut outputs: Vec<(String, f64, &Vec<usize>)> = args
        .into
        .iter()
        .zip(&parts)
        .map(|(p, rows)| (p.name.clone(), p.fraction, rows))
        .collect();
    let remainder = &parts[args.into.len()];
    if rest && !remainder.is_empty() {
        let f = 1.0 - fractions.iter().sum::<f64>();
        outputs.push((REST.to_string(), f, remainder));
    }
    std::fs::create_dir_all(&args.out_dir).map_err(|e| {
        Error::invalid(
            args.out_dir.display().to_string(),
            format!("cannot create the output directory: {e}"),
        )
    })?;
    let path_of = |name: &str| -> PathBuf { args.out_dir.join(format!("{name}.csv")) };
    if !args.force
        && let Some((name, ..)) = outputs.iter().find(|(n, ..)| path_of(n).exists())
    {
        return Err(Error::invalid(
            path_of(name).display().to_string(),
            "already exists; refusing to replace it (use --force)",
        )
        .into());
    }
    for (name, _, rows) in &outputs {
        let values = rows.iter().map(|&i| &table.rows[i].values);
        files::write_csv_file(&path_of(name), &table.columns, values, args.force)?;
    }
    report(args, table.len(), &outputs, &strata, &path_of);
    Ok(ExitCode::SUCCESS)
}

fn report(
    args: &SplitArgs,
    n: usize,
    outputs: &[(String, f64, &Vec<usize>)],
    strata: &BTreeMap<String, Vec<usize>>,
    path_of: &dyn Fn(&str) -> PathBuf,
) {
    let stratum_of: Vec<&str> = {
        let mut v = vec![""; n];
        for (value, rows) in strata {
            for &i in rows {
                v[i] = value;
            }
        }
        v
    };
    let counts = |rows: &[usize]| -> BTreeMap<&str, usize> {
        let mut c = BTreeMap::new();
        for &i in rows {
            *c.entry(stratum_of[i]).or_insert(0) += 1;
        }
        c
    };
    if args.json {
        let items: Vec<_> = outputs
            .iter()
            .map(|(name, f, rows)| {
                let mut o = json!({
                    "name": name,
                    "fraction": f,
                    "rows": rows.len(),
                    "file": path_of(name).display().to_string(),
                });
                if args.stratify.is_some() {
                    o["strata"] = json!(counts(rows));
                }
                o
            })
            .collect();
        show::print_json(&json!({
            "input": args.file.display().to_string(),
            "rows": n,
            "seed": args.seed,
            "stratify": args.stratify,
            "parts": items,
            "joint": JOINT_NOTE,
            "stratify_condition": args.stratify.as_ref().map(|_| STRATIFY_CONDITION),
        }));
        return;
    }
    let rows: Vec<Vec<String>> = outputs
        .iter()
        .map(|(name, f, rows)| {
            let mut r = vec![
                name.clone(),
                rows.len().to_string(),
                show::num(*f),
                path_of(name).display().to_string(),
            ];
            if args.stratify.is_some() {
                let c: Vec<String> = counts(rows)
                    .iter()
                    .map(|(k, v)| format!("{k}:{v}"))
                    .collect();
                r.push(c.join(" "));
            }
            r
        })
        .collect();
    let mut header = vec!["part", "rows", "fraction", "file"];
    if args.stratify.is_some() {
        header.push("per stratum");
    }
    println!(
        "split {} ({} rows, seed {}) into disjoint parts:\n{}",
        args.file.display(),
        n,
        args.seed,
        show::table(&header, &rows)
    );
    println!(
        "Create each part as its own holdout (holdout create NAME --labels FILE ...): disjoint rows \
         are independent, so each gets its own budget.\n{JOINT_NOTE}"
    );
    if args.stratify.is_some() {
        println!("{STRATIFY_CONDITION}");
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parts(spec: &[(&str, f64)]) -> Vec<Part> {
        spec.iter()
            .map(|(n, f)| Part {
                name: n.to_string(),
                fraction: *f,
            })
            .collect()
    }

    fn flat(p: &[Vec<usize>]) -> Vec<usize> {
        let mut all = p.concat();
        all.sort_unstable();
        all
    }

    #[test]
    fn parts_are_disjoint_and_cover_the_input() {
        let rows: Vec<usize> = (0..1001).collect();
        let p = assign(std::slice::from_ref(&rows), &[0.7, 0.3], 42);
        assert_eq!(p.len(), 3);
        assert_eq!(flat(&p), rows, "union is the input, no row twice");
        assert_eq!(p[0].len(), 701);
        assert_eq!(p[1].len(), 300);
        assert_eq!(apportion(10, &[0.5, 0.5, 0.0]), [5, 5, 0]);
        assert_eq!(apportion(3, &[0.5, 0.5, 0.0]), [2, 1, 0]);
        assert!(p[2].is_empty(), "fractions summing to 1 leave no remainder");
        let q = assign(std::slice::from_ref(&rows), &[0.25, 0.25], 42);
        assert_eq!(flat(&q), rows);
        assert_eq!((q[0].len(), q[1].len(), q[2].len()), (250, 250, 501));
    }

    #[test]
    fn the_seed_decides() {
        let rows: Vec<usize> = (0..500).collect();
        let a = assign(std::slice::from_ref(&rows), &[0.5], 7);
        assert_eq!(a, assign(std::slice::from_ref(&rows), &[0.5], 7));
        assert_ne!(a[0], assign(std::slice::from_ref(&rows), &[0.5], 8)[0]);
        assert_ne!(
            a[0],
            (0..250).collect::<Vec<_>>(),
            "rows are shuffled, not taken in order"
        );
    }

    #[test]
    fn strata_are_split_in_the_same_fractions() {
        let s0: Vec<usize> = (0..900).collect();
        let s1: Vec<usize> = (900..1000).collect();
        let p = assign(&[s0.clone(), s1.clone()], &[0.8, 0.2], 3);
        let in_s1 = |v: &Vec<usize>| v.iter().filter(|&&i| i >= 900).count();
        assert_eq!(in_s1(&p[0]), 80);
        assert_eq!(in_s1(&p[1]), 20);
        assert_eq!(p[0].len(), 800);
        assert_eq!(flat(&p), (0..1000).collect::<Vec<_>>());
    }

    #[test]
    fn bad_fractions_and_names() {
        for bad in [
            parts(&[("a", 0.7), ("b", 0.4)]),
            parts(&[("a", 0.0)]),
            parts(&[("a", -0.1)]),
            parts(&[("a", 1.5)]),
            parts(&[("a", f64::NAN)]),
            parts(&[("a", 0.5), ("a", 0.5)]),
            parts(&[("../x", 0.5)]),
            parts(&[("", 0.5)]),
            parts(&[("rest", 0.5)]),
            parts(&[]),
        ] {
            assert!(
                matches!(check_parts(&bad), Err(Error::InvalidArgument { .. })),
                "{bad:?} should be refused"
            );
        }
        assert_eq!(
            check_parts(&parts(&[("a", 0.7), ("b", 0.3)])).ok(),
            Some(false)
        );
        assert_eq!(check_parts(&parts(&[("a", 0.1)])).ok(), Some(true));
        assert_eq!(
            check_parts(&parts(&[("rest", 0.4), ("b", 0.6)])).ok(),
            Some(false)
        );
        assert!(parse_part("a").is_err());
        assert!(parse_part("a=x").is_err());
        assert_eq!(
            parse_part(" feedback = 0.5").ok(),
            Some(Part {
                name: "feedback".into(),
                fraction: 0.5
            })
        );
    }

    #[test]
    fn run_writes_disjoint_files() {
        let dir = tempfile::tempdir().expect("tempdir");
        let input = dir.path().join("all.csv");
        let mut body = String::from("label,id,x\n");
        for i in 0..200 {
            body.push_str(&format!("{},r{i},{}\n", i % 4 == 0, i * 3));
        }
        std::fs::write(&input, body).expect("write");
        let out = dir.path().join("parts");
        let args = SplitArgs {
            file: input.clone(),
            into: parts(&[("feedback", 0.5), ("final", 0.25)]),
            seed: 9,
            stratify: Some("label".into()),
            id_column: "id".into(),
            out_dir: out.clone(),
            force: false,
            json: true,
            max_file_bytes: DEFAULT_MAX_FILE_BYTES,
        };
        run(&args).expect("split");
        let read = |name: &str| {
            files::read_table(&out.join(name), &TableSpec::all_columns("id")).expect("read part")
        };
        let (a, b, r) = (read("feedback.csv"), read("final.csv"), read("rest.csv"));
        assert_eq!(a.columns, ["label", "id", "x"]);
        assert_eq!(a.len() + b.len() + r.len(), 200);
        assert_eq!(a.len(), 100);
        assert!((49..=51).contains(&b.len()), "final has {}", b.len());
        let mut ids: Vec<String> = [&a, &b, &r]
            .iter()
            .flat_map(|t| t.rows.iter().map(|row| row.id.clone()))
            .collect();
        ids.sort();
        let mut want: Vec<String> = (0..200).map(|i| format!("r{i}")).collect();
        want.sort();
        assert_eq!(ids, want);
        let trues = |t: &files::Table| t.rows.iter().filter(|r| r.values[0] == "true").count();
        // 50 rows have label true: each part gets its fraction of them to within one row.
        assert_eq!(trues(&a), 25);
        assert!((12..=13).contains(&trues(&b)), "{}", trues(&b));
        // A second run refuses to replace the files.
        assert!(run(&args).is_err());
    }
}
