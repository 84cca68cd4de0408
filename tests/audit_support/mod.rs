//! Ledger generator for the audit tests, the fixture and the benchmark: drives the real engine
//! (create, users, submissions) in process on an in-memory database under a fixed clock, so the
//! ledger is exactly what the daemon writes.
#![allow(dead_code)]

use std::sync::Arc;

use holdout_ledger::audit::LabelColumns;
use holdout_ledger::audit::export::Export;
use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Engine, FixedClock, ModelPredictions, PolicyInput, RawValues, Retention,
    SubmitMode, SubmitOutcome, SubmitRequest, TargetDecl,
};
use holdout_ledger::ledger;
use holdout_ledger::store::Store;

/// A generated holdout with its engine, users and labels.
pub struct Generated {
    pub engine: Engine,
    pub clock: Arc<FixedClock>,
    pub name: String,
    pub ids: Vec<String>,
    pub labels: Vec<String>,
    pub analysts: Vec<Caller>,
    pub auditor: Caller,
    /// Entry numbers of answers.
    pub answer_entries: Vec<u64>,
    state: u64,
}

fn caller(engine: &mut Engine, name: &str, roles: &[Role], team: Option<&str>) -> Caller {
    let now = engine.now();
    engine
        .write(|w| auth::add_user(w, name, roles, team, "custodian", now))
        .unwrap();
    Caller {
        name: name.into(),
        roles: roles.to_vec(),
        team: team.unwrap_or("").into(),
    }
}

impl Generated {
    /// A binary-error holdout of `rows` rows under `policy`, with `teams` analyst teams.
    pub fn new(name: &str, rows: usize, policy: PolicyInput, teams: usize, seed: u64) -> Self {
        Generated::keeping(name, rows, policy, teams, seed, Retention::Digests)
    }

    /// [`Generated::new`] under a retention of prediction files.
    pub fn keeping(
        name: &str,
        rows: usize,
        policy: PolicyInput,
        teams: usize,
        seed: u64,
        retention: Retention,
    ) -> Self {
        let t0 = chrono::DateTime::parse_from_rfc3339("2026-03-01T09:00:00Z")
            .unwrap()
            .to_utc();
        let clock = Arc::new(FixedClock::new(t0));
        let mut engine = Engine::new(Store::open_in_memory().unwrap(), clock.clone());
        let custodian = caller(&mut engine, "custodian", &[Role::Custodian], None);
        let auditor = caller(&mut engine, "auditor", &[Role::Auditor], None);
        let analysts: Vec<Caller> = (0..teams)
            .map(|t| {
                let name = format!("analyst{t}");
                let team = format!("team{t}");
                caller(&mut engine, &name, &[Role::Analyst], Some(&team))
            })
            .collect();
        let mut state = seed.wrapping_mul(6364136223846793005).wrapping_add(1);
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            state >> 33
        };
        let ids: Vec<String> = (0..rows).map(|i| format!("r{i:06}")).collect();
        let labels: Vec<String> = (0..rows).map(|_| (next() % 2).to_string()).collect();
        engine
            .create_keeping(
                &custodian,
                CreateRequest {
                    name: name.into(),
                    description: "generated for audit tests".into(),
                    policy,
                    targets: vec![TargetDecl {
                        name: "y".into(),
                        column: "label".into(),
                        metric: "error".parse().unwrap(),
                        method: String::new(),
                        classes: vec!["0".into(), "1".into()],
                    }],
                    ids: ids.clone(),
                    columns: vec![labels.clone()],
                },
                None,
                1,
                retention,
            )
            .unwrap();
        Generated {
            engine,
            clock,
            name: name.into(),
            ids,
            labels,
            analysts,
            auditor,
            answer_entries: Vec::new(),
            state: next(),
        }
    }

    fn rand(&mut self) -> u64 {
        self.state = self
            .state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        self.state >> 33
    }

    /// One submission by team `t`: predictions that agree with the labels on about
    /// `accuracy` percent of rows. Returns the outcome.
    pub fn submit(&mut self, t: usize, accuracy: u64) -> SubmitOutcome {
        let preds = self.predictions(accuracy);
        self.submit_values(t, preds, "")
    }

    /// One submission by `caller` as given (the engine takes the caller's name and team as
    /// authenticated; tests use this to write entries the identity chain does not back).
    #[allow(dead_code)]
    pub fn submit_as(&mut self, caller: &Caller, accuracy: u64) -> SubmitOutcome {
        let preds = self.predictions(accuracy);
        self.submit_values_as(caller, preds, "")
    }

    /// Predictions that agree with the labels on about `accuracy` percent of rows.
    pub fn predictions(&mut self, accuracy: u64) -> Vec<String> {
        (0..self.labels.len())
            .map(|i| {
                let flip = self.rand() % 100 >= accuracy;
                let l = &self.labels[i];
                if flip {
                    if l == "1" { "0".into() } else { "1".into() }
                } else {
                    l.clone()
                }
            })
            .collect()
    }

    /// A request with predictions that agree with the labels on about `accuracy` percent of
    /// rows.
    #[allow(dead_code)]
    pub fn request(&mut self, accuracy: u64) -> SubmitRequest {
        let preds = self.predictions(accuracy);
        SubmitRequest {
            holdout: self.name.clone(),
            target: String::new(),
            mode: SubmitMode::Answer,
            request_id: None,
            note: String::new(),
            max_cost_nats: None,
            model_names: vec![],
            models: vec![ModelPredictions {
                ids: self.ids.clone(),
                values: RawValues::Classes(preds),
            }],
            mark_final: false,
        }
    }

    /// One submission of `preds` (in row order) by team `t`, with a note.
    pub fn submit_values(&mut self, t: usize, preds: Vec<String>, note: &str) -> SubmitOutcome {
        let caller = self.analysts[t].clone();
        self.submit_values_as(&caller, preds, note)
    }

    /// One submission of `preds` (in row order) by `caller` as given, with a note.
    pub fn submit_values_as(
        &mut self,
        caller: &Caller,
        preds: Vec<String>,
        note: &str,
    ) -> SubmitOutcome {
        let out = self
            .engine
            .submit(
                caller,
                SubmitRequest {
                    holdout: self.name.clone(),
                    target: String::new(),
                    mode: SubmitMode::Answer,
                    request_id: None,
                    note: note.into(),
                    max_cost_nats: None,
                    model_names: vec![],
                    models: vec![ModelPredictions {
                        ids: self.ids.clone(),
                        values: RawValues::Classes(preds),
                    }],
                    mark_final: false,
                },
            )
            .unwrap();
        if let SubmitOutcome::Answer {
            receipt,
            replayed: false,
            ..
        } = &out
        {
            // Receipts name entries by hash; the harness keeps their positions for tampering.
            // The answer just written is the chain's head: walk the chain's primary key
            // (chain, seq) from the newest entry down and stop at the hash, so finding it does
            // not scan the whole ledger (the product schema has no index on `hash`, and a
            // 100,000-entry benchmark ledger made that scan quadratic).
            let seq: i64 = self
                .engine
                .store()
                .conn()
                .query_row(
                    "SELECT seq FROM ledger WHERE chain = ?1 AND hash = ?2
                     ORDER BY seq DESC LIMIT 1",
                    [&self.name, &receipt.entry_hash],
                    |r| r.get(0),
                )
                .unwrap();
            self.answer_entries.push(seq as u64);
        }
        out
    }

    /// Adds a user and returns them as a caller.
    pub fn user(&mut self, name: &str, roles: &[Role], team: Option<&str>) -> Caller {
        caller(&mut self.engine, name, roles, team)
    }

    /// Revokes a user now (a `user-revoked` event, as `holdout user revoke` records it).
    pub fn revoke(&mut self, name: &str) {
        let now = self.engine.now();
        self.engine
            .write(|w| auth::revoke_user(w, name, "custodian", now))
            .unwrap();
    }

    /// Rotates a user's token now (a `token-rotated` event).
    pub fn rotate(&mut self, name: &str) {
        let now = self.engine.now();
        self.engine
            .write(|w| auth::rotate_token(w, name, now))
            .unwrap();
    }

    /// Advances the fixed clock.
    pub fn advance(&mut self, secs: i64) {
        let now = self.engine.now() + chrono::Duration::seconds(secs);
        self.clock.set(now);
    }

    /// The export as `holdout export` writes it.
    pub fn export(&mut self) -> Export {
        let conn = self.engine.store().conn();
        let entries = ledger::read_chain(conn, &self.name).unwrap();
        let users = ledger::read_chain(conn, ledger::USERS_CHAIN).unwrap();
        let kept = holdout_ledger::engine::kept_files(conn, &self.name).unwrap();
        Export::new(&self.name, "2026-03-02T00:00:00Z", entries, users).with_kept(kept)
    }

    /// A predictions file (`id,prediction`) for `preds` in row order.
    pub fn predictions_csv(&self, preds: &[String]) -> String {
        let mut s = String::from("id,prediction\n");
        for (id, p) in self.ids.iter().zip(preds) {
            s.push_str(&format!("{id},{p}\n"));
        }
        s
    }

    /// The labels file (`id,label`) an auditor holds.
    pub fn labels_csv(&self) -> String {
        let mut s = String::from("id,label\n");
        for (id, l) in self.ids.iter().zip(&self.labels) {
            s.push_str(&format!("{id},{l}\n"));
        }
        s
    }

    /// The labels as an auditor would read them from the labels file.
    pub fn label_columns(&self) -> LabelColumns {
        LabelColumns {
            ids: self.ids.clone(),
            columns: vec![self.labels.clone()],
        }
    }

    /// A signed checkpoint of the current head.
    pub fn checkpoint(&mut self) -> holdout_ledger::audit::anchor::Checkpoint {
        let at = auth::rfc3339(self.engine.now());
        let name = self.name.clone();
        holdout_ledger::audit::anchor::checkpoint(self.engine.store().conn(), &name, &at).unwrap()
    }
}

/// Recomputes links and hashes from position `from` on, as someone rebuilding a chain would.
pub fn rehash(entries: &mut [ledger::Entry], from: usize) {
    for i in from..entries.len() {
        let prev = if i == 0 {
            ledger::ZERO_HASH.to_string()
        } else {
            entries[i - 1].hash.clone()
        };
        let e = &mut entries[i];
        e.seq = i as u64;
        e.prev_hash = prev;
        e.hash = ledger::Encoding::V2.hash(e).unwrap();
    }
}

/// Changes an entry's body (kept canonical); the hashes are left for [`rehash`].
pub fn edit_body(e: &mut ledger::Entry, f: impl FnOnce(&mut serde_json::Value)) {
    let mut v: serde_json::Value = serde_json::from_str(&e.body).unwrap();
    f(&mut v);
    e.body = ledger::canonical_json(&v);
}

/// A small ledger with answers, a refusal past the tolerance, two teams and a read.
pub fn small(seed: u64) -> Generated {
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.2,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("audited", 300, policy, 2, seed);
    for q in 0..6 {
        g.advance(60);
        g.submit(q % 2, 60 + 5 * q as u64);
    }
    g
}
