//! The demo's invented world: shipments of the Kestrel Parcel Cooperative, whether each was
//! late, and the models three squads build to predict it. Everything here is made up and
//! deterministic (one seed), so the demo tells the same story on every run.
//!
//! Each shipment has a hidden risk `a` (a log-odds); it is late with probability
//! `p = 1 / (1 + e^-a)`, drawn once for the sealed label. A model sees the risk through noise of
//! its own and says "late" when `a + shift + noise * z > 0`. Because the demo knows `p` for every
//! shipment it can say what no holdout can: a file's *true* error, its expected error on fresh
//! labels for the same shipments (`p` where it says on-time, `1 - p` where it says late). That
//! is the quantity every interval of the ledger speaks about.

/// A tiny deterministic generator (splitmix64).
#[derive(Debug, Clone)]
pub struct Mix(pub u64);

impl Mix {
    /// The next 64 random bits.
    pub fn bits(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        (self.bits() >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Standard normal (Box-Muller).
    pub fn normal(&mut self) -> f64 {
        let u = self.unit().max(f64::MIN_POSITIVE);
        let v = self.unit();
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

/// The class names of the demo's one target.
pub const CLASSES: [&str; 2] = ["late", "on-time"];

/// A set of shipments with their sealed labels.
#[derive(Debug, Clone)]
pub struct Shipments {
    /// Global row numbers (ids are made from them, and models' noise is tied to them).
    pub rows: Vec<u64>,
    /// Row ids, `shp-NNNNNN`.
    pub ids: Vec<String>,
    /// Hidden risk (log-odds of being late).
    pub risk: Vec<f64>,
    /// The sealed labels: was the shipment late?
    pub late: Vec<bool>,
}

impl Shipments {
    /// Draws shipments `first .. first + n` of the invented year.
    pub fn draw(first: u64, n: usize, seed: u64) -> Shipments {
        let mut rng = Mix(seed ^ first.wrapping_mul(0x2545_F491_4F6C_DD1D));
        let rows: Vec<u64> = (first..first + n as u64).collect();
        let risk: Vec<f64> = rows.iter().map(|_| -1.2 + 2.0 * rng.normal()).collect();
        let late = risk.iter().map(|a| rng.unit() < p_late(*a)).collect();
        Shipments {
            ids: rows.iter().map(|r| format!("shp-{r:06}")).collect(),
            rows,
            risk,
            late,
        }
    }

    /// Number of shipments.
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// The labels as the holdout's classes.
    pub fn labels(&self) -> Vec<String> {
        classes(&self.late)
    }

    /// The error of `says_late` on the sealed labels: what a plain scorer would print.
    pub fn plain_error(&self, says_late: &[bool]) -> f64 {
        let wrong = says_late
            .iter()
            .zip(&self.late)
            .filter(|(s, l)| s != l)
            .count();
        wrong as f64 / self.len() as f64
    }

    /// The true error of `says_late`: its expected error on fresh labels for the same
    /// shipments.
    pub fn true_error(&self, says_late: &[bool]) -> f64 {
        let total: f64 = says_late
            .iter()
            .zip(&self.risk)
            .map(|(s, a)| if *s { 1.0 - p_late(*a) } else { p_late(*a) })
            .sum();
        total / self.len() as f64
    }
}

fn p_late(a: f64) -> f64 {
    1.0 / (1.0 + (-a).exp())
}

/// A model: how noisily it sees each shipment's risk, and where it draws the line.
#[derive(Debug, Clone, Copy)]
pub struct Model {
    /// Noise on the risk (smaller is better).
    pub noise: f64,
    /// Added to the risk before the cut at 0 (0 is the best cut).
    pub shift: f64,
    /// Which noise: models with the same seed see the same noise on a shipment.
    pub seed: u64,
}

impl Model {
    /// Its predictions (true: late) for `s`.
    pub fn predict(&self, s: &Shipments) -> Vec<bool> {
        s.rows
            .iter()
            .zip(&s.risk)
            .map(|(row, a)| {
                let z = Mix(self.seed ^ row.wrapping_mul(0x9E37_79B9_7F4A_7C15)).normal();
                a + self.shift + self.noise * z > 0.0
            })
            .collect()
    }
}

/// A file of coin flips: the overfitting attack's raw material.
pub fn coin_flips(rng: &mut Mix, n: usize) -> Vec<bool> {
    (0..n).map(|_| rng.unit() < 0.5).collect()
}

/// Each row's majority among `files`; a tie is settled by a fair coin of that row.
pub fn majority(files: &[Vec<bool>]) -> Vec<bool> {
    let n = files.first().map_or(0, Vec::len);
    (0..n)
        .map(|i| {
            let late = 2 * files.iter().filter(|f| f[i]).count();
            match late.cmp(&files.len()) {
                std::cmp::Ordering::Greater => true,
                std::cmp::Ordering::Less => false,
                std::cmp::Ordering::Equal => Mix(0x7135 ^ i as u64).bits() & 1 == 1,
            }
        })
        .collect()
}

/// Predictions as the target's class names.
pub fn classes(says_late: &[bool]) -> Vec<String> {
    says_late
        .iter()
        .map(|l| CLASSES[usize::from(!*l)].to_string())
        .collect()
}

/// The overfitting attack against a plain scorer that prints every file's exact error: `k`
/// files of coin flips, keep those that scored better than 0.5, submit their majority vote.
/// Returns (files kept, the scorer's error for the vote, the vote's true error).
pub fn attack_plain_scorer(s: &Shipments, k: usize, seed: u64) -> (usize, f64, f64) {
    let mut rng = Mix(seed);
    let kept: Vec<Vec<bool>> = (0..k)
        .map(|_| coin_flips(&mut rng, s.len()))
        .filter(|f| s.plain_error(f) < 0.5)
        .collect();
    let vote = majority(&kept);
    (kept.len(), s.plain_error(&vote), s.true_error(&vote))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_world_is_deterministic_and_about_thirty_percent_late() {
        let a = Shipments::draw(0, 4000, 7);
        let b = Shipments::draw(0, 4000, 7);
        assert_eq!(a.late, b.late);
        let rate = a.late.iter().filter(|l| **l).count() as f64 / a.len() as f64;
        assert!((0.25..0.40).contains(&rate), "late rate {rate}");
    }

    #[test]
    fn a_less_noisy_model_has_a_lower_true_error() {
        let s = Shipments::draw(0, 4000, 7);
        let good = Model {
            noise: 0.5,
            shift: 0.0,
            seed: 1,
        };
        let poor = Model {
            noise: 3.0,
            shift: 0.0,
            seed: 1,
        };
        assert!(s.true_error(&good.predict(&s)) < s.true_error(&poor.predict(&s)));
    }

    #[test]
    fn the_attack_fools_a_plain_scorer_but_not_the_truth() {
        // Coin flips know nothing about lateness: the vote's true error is about 0.5 however
        // it was chosen, while its score on the rows it was chosen on looks much better.
        let s = Shipments::draw(0, 4000, 7);
        let (kept, plain, truth) = attack_plain_scorer(&s, 200, 11);
        assert!(kept > 50, "kept {kept}");
        assert!(plain < 0.47, "plain score {plain}");
        assert!((truth - 0.5).abs() < 0.03, "true error {truth}");
    }
}
