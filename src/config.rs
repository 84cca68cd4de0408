//! The daemon's configuration file (`serve --config FILE`, TOML) and how its values combine
//! with flags, environment variables and defaults.
//!
//! Precedence, per option: a flag on the command line, then its environment variable, then the
//! file, then the default. The file's keys are the `serve` flags' names without the leading
//! dashes (`listen = "127.0.0.1:7361"`, `max-connections = 512`, `checkpoint-dir = "/var/..."`);
//! an unknown key is an error naming it. The file's values go through the same parsers and range
//! checks as the flags. `serve --print-config` prints the effective value of every option and
//! where it came from.

use std::collections::BTreeMap;
use std::ffi::OsString;
use std::path::{Path, PathBuf};

use clap::parser::ValueSource;
use clap::{ArgMatches, CommandFactory, Parser};
use serde::{Deserialize, Serialize};

use crate::cli::local::ServeArgs;
use crate::error::{Error, Result};

/// The keys a configuration file may hold (each a `serve` flag's name).
#[derive(Debug, Default, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
#[allow(missing_docs)]
pub struct FileConfig {
    pub db: Option<PathBuf>,
    pub listen: Option<String>,
    pub log: Option<String>,
    pub web: Option<String>,
    pub checkpoint_dir: Option<PathBuf>,
    pub checkpoint_every: Option<u64>,
    pub tls_cert: Option<PathBuf>,
    pub tls_key: Option<PathBuf>,
    pub tls_client_ca: Option<PathBuf>,
    pub allow_plaintext_network: Option<bool>,
    pub max_connections: Option<u64>,
    pub handshake_timeout: Option<u64>,
    pub idle_timeout: Option<u64>,
    pub max_streams_per_connection: Option<u32>,
    pub max_message_bytes: Option<u64>,
    pub max_submit_bytes: Option<u64>,
    pub max_create_bytes: Option<u64>,
    pub max_batch: Option<u64>,
    pub probe_share_factor: Option<f64>,
    pub probe_run: Option<u32>,
    pub probe_diff: Option<f64>,
    pub alert_share: Option<f64>,
    pub alert_margin: Option<f64>,
    pub alert_command: Option<PathBuf>,
    pub keep_predictions_days: Option<u32>,
}

impl FileConfig {
    /// Reads and parses a configuration file; an unknown key is refused naming it.
    pub fn read(path: &Path) -> Result<FileConfig> {
        let text = std::fs::read_to_string(path).map_err(|e| {
            Error::invalid("--config", format!("cannot read {}: {e}", path.display()))
        })?;
        FileConfig::parse(&text)
            .map_err(|why| Error::invalid(format!("--config {}", path.display()), why))
    }

    /// Parses the text of a configuration file.
    pub fn parse(text: &str) -> std::result::Result<FileConfig, String> {
        toml::from_str(text).map_err(|e| e.message().to_string())
    }

    /// The file's values as `serve` arguments (`--key value`, `--flag` for true), in key order.
    fn as_args(&self) -> Vec<OsString> {
        let value = serde_json::to_value(self).unwrap_or_default();
        let mut out = Vec::new();
        if let serde_json::Value::Object(map) = value {
            for (key, v) in map {
                match v {
                    serde_json::Value::Null | serde_json::Value::Bool(false) => {}
                    serde_json::Value::Bool(true) => out.push(format!("--{key}").into()),
                    serde_json::Value::String(s) => {
                        out.push(format!("--{key}").into());
                        out.push(s.into());
                    }
                    other => {
                        out.push(format!("--{key}").into());
                        out.push(other.to_string().into());
                    }
                }
            }
        }
        out
    }

    /// The keys the file sets, as clap ids (snake_case).
    fn keys(&self) -> Vec<String> {
        match serde_json::to_value(self).unwrap_or_default() {
            serde_json::Value::Object(map) => map
                .into_iter()
                .filter(|(_, v)| !v.is_null())
                .map(|(k, _)| k.replace('-', "_"))
                .collect(),
            _ => Vec::new(),
        }
    }
}

/// Where an effective value came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// A flag on the command line.
    Flag,
    /// An environment variable.
    Environment,
    /// The configuration file.
    File,
    /// The built-in default (or unset).
    Default,
}

impl Source {
    /// Its name in `--print-config`.
    pub fn as_str(self) -> &'static str {
        match self {
            Source::Flag => "flag",
            Source::Environment => "environment",
            Source::File => "file",
            Source::Default => "default",
        }
    }
}

/// `serve`'s arguments alone, to parse a file's values with the flags' own parsers.
#[derive(Debug, Parser)]
#[command(name = "serve")]
struct FileArgs {
    #[command(flatten)]
    args: ServeArgs,
}

/// The effective `serve` options and each one's source (keyed by flag name).
#[derive(Debug)]
pub struct Effective {
    /// The options.
    pub args: ServeArgs,
    /// flag name (kebab-case) -> (value as text, source).
    pub sources: BTreeMap<String, (String, Source)>,
}

impl Effective {
    /// The `--print-config` text: one `key = value  # source` line per option, TOML that
    /// `--config` reads back (unset options are shown as comments).
    pub fn render(&self) -> String {
        let mut out = match &self.args.config {
            Some(p) => format!("# effective options; configuration file {}\n", p.display()),
            None => "# effective options; no configuration file\n".to_string(),
        };
        for (key, (value, source)) in &self.sources {
            if value.is_empty() {
                out.push_str(&format!("# {key} (unset)  # {}\n", source.as_str()));
            } else {
                out.push_str(&format!("{key} = {value}  # {}\n", source.as_str()));
            }
        }
        out
    }
}

trait Show {
    fn show(&self) -> String;
}

impl Show for String {
    fn show(&self) -> String {
        toml_string(self)
    }
}
impl Show for PathBuf {
    fn show(&self) -> String {
        toml_string(&self.display().to_string())
    }
}
impl<T: Show> Show for Option<T> {
    fn show(&self) -> String {
        self.as_ref().map(Show::show).unwrap_or_default()
    }
}
impl Show for u64 {
    fn show(&self) -> String {
        self.to_string()
    }
}
impl Show for u32 {
    fn show(&self) -> String {
        self.to_string()
    }
}
impl Show for f64 {
    fn show(&self) -> String {
        format!("{self:?}")
    }
}
impl Show for bool {
    fn show(&self) -> String {
        self.to_string()
    }
}

fn toml_string(s: &str) -> String {
    // A TOML basic string is a JSON string for the characters a path or address holds.
    serde_json::Value::String(s.to_string()).to_string()
}

/// Combines `args` (as parsed, with `matches` telling which came from a flag or the
/// environment) with the file named by `--config`.
pub fn resolve(mut args: ServeArgs, matches: &ArgMatches) -> Result<Effective> {
    let file = match &args.config {
        Some(path) => FileConfig::read(path)?,
        None => FileConfig::default(),
    };
    let mut argv: Vec<OsString> = vec!["serve".into()];
    argv.extend(file.as_args());
    let parsed = FileArgs::try_parse_from(&argv).map_err(|e| {
        let text = e.to_string();
        let first = text
            .lines()
            .next()
            .unwrap_or("")
            .trim_start_matches("error: ");
        Error::invalid(
            format!(
                "--config {}",
                args.config
                    .as_deref()
                    .map(|p| p.display().to_string())
                    .unwrap_or_default()
            ),
            first.to_string(),
        )
    })?;
    let from_file = parsed.args;
    let keys = file.keys();
    let mut sources = BTreeMap::new();
    let source_of = |id: &str| match matches.value_source(id) {
        Some(ValueSource::CommandLine) => Source::Flag,
        Some(ValueSource::EnvVariable) => Source::Environment,
        _ => Source::Default,
    };
    macro_rules! pick {
        ($($field:ident),* $(,)?) => {$(
            let id = stringify!($field);
            let mut source = source_of(id);
            if source == Source::Default && keys.iter().any(|k| k == id) {
                args.$field = from_file.$field.clone();
                source = Source::File;
            }
            sources.insert(id.replace('_', "-"), (args.$field.show(), source));
        )*};
    }
    pick!(
        db,
        listen,
        log,
        web,
        checkpoint_dir,
        checkpoint_every,
        tls_cert,
        tls_key,
        tls_client_ca,
        allow_plaintext_network,
        max_connections,
        handshake_timeout,
        idle_timeout,
        max_streams_per_connection,
        max_message_bytes,
        max_submit_bytes,
        max_create_bytes,
        max_batch,
        probe_share_factor,
        probe_run,
        probe_diff,
        alert_share,
        alert_margin,
        alert_command,
        keep_predictions_days,
    );
    // The pairs the flags require of each other hold for the combination too.
    if args.tls_cert.is_some() != args.tls_key.is_some() {
        return Err(Error::invalid(
            "tls-cert/tls-key",
            "give both the certificate and the key (flags or file), or neither",
        ));
    }
    if args.tls_client_ca.is_some() && args.tls_cert.is_none() {
        return Err(Error::invalid(
            "tls-client-ca",
            "needs tls-cert and tls-key",
        ));
    }
    Ok(Effective { args, sources })
}

/// [`resolve`] for the running binary: the `serve` subcommand's matches are taken from this
/// process's own command line (the environment is read again by the same parse).
pub fn resolve_from_process(args: ServeArgs) -> Result<Effective> {
    let matches = crate::cli::Cli::command()
        .try_get_matches_from(std::env::args_os())
        .map_err(|e| Error::invalid("command line", e.to_string()))?;
    let sub = matches
        .subcommand_matches("serve")
        .cloned()
        // Not started as `holdout serve` (the library called directly): no value is known to
        // come from a flag or the environment.
        .unwrap_or_else(|| FileArgs::command().get_matches_from(["serve"]));
    resolve(args, &sub)
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::FromArgMatches;

    fn matches_of(argv: &[&str]) -> (ServeArgs, ArgMatches) {
        let m = FileArgs::command().get_matches_from(argv);
        (FileArgs::from_arg_matches(&m).unwrap().args, m)
    }

    #[test]
    fn an_unknown_key_is_refused_by_name() {
        let err = FileConfig::parse("listen = \"127.0.0.1:1\"\nmax-conections = 3\n").unwrap_err();
        assert!(err.contains("max-conections"), "{err}");
    }

    #[test]
    fn file_fills_what_flags_leave_and_checks_ranges() -> Result<()> {
        let dir = tempfile::tempdir()?;
        let cfg = dir.path().join("c.toml");
        std::fs::write(
            &cfg,
            "listen = \"127.0.0.1:9\"\nmax-connections = 7\nprobe-diff = 0.5\n",
        )?;
        let c = cfg.display().to_string();
        let (args, m) = matches_of(&["serve", "--config", &c, "--max-connections", "9"]);
        let e = resolve(args, &m)?;
        assert_eq!(e.args.listen, "127.0.0.1:9");
        assert_eq!(e.args.max_connections, 9);
        assert_eq!(e.args.probe_diff, 0.5);
        assert_eq!(e.sources["listen"].1, Source::File);
        assert_eq!(e.sources["max-connections"].1, Source::Flag);
        assert_eq!(e.sources["idle-timeout"], ("120".into(), Source::Default));
        // The file's values pass the flags' range checks.
        std::fs::write(&cfg, "idle-timeout = 1\n")?;
        let (args, m) = matches_of(&["serve", "--config", &c]);
        let err = resolve(args, &m).unwrap_err().to_string();
        assert!(err.contains("idle-timeout"), "{err}");
        Ok(())
    }
}
