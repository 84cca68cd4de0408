//! Connecting to the daemon: the endpoint, the bearer token, and turning statuses into errors.

use std::time::Duration;

use tonic::metadata::{Ascii, MetadataValue};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Channel, Endpoint};
use tonic::{Request, Status};

use crate::error::Error;
use crate::proto::v1::holdouts_client::HoldoutsClient;
use crate::proto::v1::ledger_client::LedgerClient;
use crate::proto::v1::submissions_client::SubmissionsClient;
use crate::proto::v1::users_client::UsersClient;

/// Default daemon address.
pub const DEFAULT_SERVER: &str = "http://127.0.0.1:7361";

/// Flow-control windows: large enough that 8192-row chunks stream without stalls.
const WINDOW_BYTES: u32 = 4 << 20;
/// Largest reply accepted (declarations and listings can be long).
const MAX_REPLY_BYTES: usize = 256 << 20;
/// Largest request message (one chunk).
const MAX_REQUEST_BYTES: usize = 64 << 20;

/// Where the daemon is and who is asking.
#[derive(Debug, Clone, clap::Args)]
pub struct ServerArgs {
    /// Address of the daemon (http://HOST:PORT; "http://" is added when missing).
    #[arg(long, env = "HOLDOUT_SERVER", default_value = DEFAULT_SERVER, value_name = "URL")]
    pub server: String,
    /// Bearer token (from `holdout init --token-out` or `holdout user add`).
    #[arg(
        long,
        env = "HOLDOUT_TOKEN",
        hide_env_values = true,
        value_name = "TOKEN"
    )]
    pub token: Option<String>,
    /// TLS: the CA certificate (PEM) the daemon's certificate must chain to; use an https://
    /// --server address. Without it, https:// trusts the system's roots.
    #[arg(long, env = "HOLDOUT_CA", value_name = "FILE")]
    pub ca: Option<std::path::PathBuf>,
    /// Mutual TLS: this client's certificate (PEM), with --client-key.
    #[arg(
        long,
        env = "HOLDOUT_CLIENT_CERT",
        value_name = "FILE",
        requires = "client_key"
    )]
    pub client_cert: Option<std::path::PathBuf>,
    /// Mutual TLS: this client's private key (PEM).
    #[arg(
        long,
        env = "HOLDOUT_CLIENT_KEY",
        value_name = "FILE",
        requires = "client_cert"
    )]
    pub client_key: Option<std::path::PathBuf>,
}

/// Adds `authorization: Bearer TOKEN` to every request.
#[derive(Debug, Clone)]
pub struct Auth {
    header: Option<MetadataValue<Ascii>>,
}

impl tonic::service::Interceptor for Auth {
    fn call(&mut self, mut request: Request<()>) -> Result<Request<()>, Status> {
        if let Some(h) = &self.header {
            request.metadata_mut().insert("authorization", h.clone());
        }
        Ok(request)
    }
}

/// A channel that carries the caller's token.
pub type AuthChannel = InterceptedService<Channel, Auth>;

/// An open connection to the daemon.
#[derive(Debug, Clone)]
pub struct Conn {
    /// The address connected to, as shown in messages.
    pub url: String,
    channel: Channel,
    auth: Auth,
}

impl Conn {
    /// Connects eagerly, so an unreachable daemon is reported before any work is done.
    ///
    /// # Errors
    /// Bad input for a malformed URL or token; a transport error (exit code 6) naming the URL
    /// when the daemon cannot be reached.
    pub async fn open(args: &ServerArgs) -> anyhow::Result<Conn> {
        let url = if args.server.contains("://") {
            args.server.clone()
        } else {
            format!("http://{}", args.server)
        };
        let header = match args.token.as_deref().map(str::trim) {
            None | Some("") => None,
            Some(t) => Some(
                format!("Bearer {t}")
                    .parse::<MetadataValue<Ascii>>()
                    .map_err(|_| {
                        Error::invalid(
                            "--token",
                            "the token holds characters a header cannot carry",
                        )
                    })?,
            ),
        };
        let mut endpoint = Endpoint::from_shared(url.clone())
            .map_err(|e| Error::invalid("--server", format!("{url:?} is not a valid URL: {e}")))?;
        let tls = url.starts_with("https://");
        if !tls && (args.ca.is_some() || args.client_cert.is_some()) {
            return Err(Error::invalid(
                "--server",
                format!("--ca and --client-cert need an https:// address, got {url}"),
            )
            .into());
        }
        if tls {
            let read = |flag: &str, p: &std::path::Path| {
                std::fs::read(p).map_err(|e| {
                    Error::invalid(
                        flag.to_string(),
                        format!("cannot read {}: {e}", p.display()),
                    )
                })
            };
            let mut config = tonic::transport::ClientTlsConfig::new();
            match &args.ca {
                Some(ca) => {
                    config = config
                        .ca_certificate(tonic::transport::Certificate::from_pem(read("--ca", ca)?))
                }
                None => config = config.with_enabled_roots(),
            }
            if let (Some(c), Some(k)) = (&args.client_cert, &args.client_key) {
                config = config.identity(tonic::transport::Identity::from_pem(
                    read("--client-cert", c)?,
                    read("--client-key", k)?,
                ));
            }
            endpoint = endpoint
                .tls_config(config)
                .map_err(|e| Error::invalid("--ca", format!("TLS setup failed: {e}")))?;
        }
        let endpoint = endpoint
            .connect_timeout(Duration::from_secs(5))
            .initial_stream_window_size(WINDOW_BYTES)
            .initial_connection_window_size(WINDOW_BYTES)
            .tcp_nodelay(true);
        let channel = endpoint.connect().await.map_err(|e| {
            anyhow::Error::new(e).context(format!("cannot reach the daemon at {url}"))
        })?;
        Ok(Conn {
            url,
            channel,
            auth: Auth { header },
        })
    }

    /// The holdout service.
    pub fn holdouts(&self) -> HoldoutsClient<AuthChannel> {
        HoldoutsClient::with_interceptor(self.channel.clone(), self.auth.clone())
            .max_decoding_message_size(MAX_REPLY_BYTES)
            .max_encoding_message_size(MAX_REQUEST_BYTES)
    }

    /// The submission service.
    pub fn submissions(&self) -> SubmissionsClient<AuthChannel> {
        SubmissionsClient::with_interceptor(self.channel.clone(), self.auth.clone())
            .max_decoding_message_size(MAX_REPLY_BYTES)
            .max_encoding_message_size(MAX_REQUEST_BYTES)
    }

    /// The ledger service (export, checkpoints).
    pub fn ledger(&self) -> LedgerClient<AuthChannel> {
        LedgerClient::with_interceptor(self.channel.clone(), self.auth.clone())
            .max_decoding_message_size(MAX_REPLY_BYTES)
            .max_encoding_message_size(MAX_REQUEST_BYTES)
    }

    /// The user service.
    pub fn users(&self) -> UsersClient<AuthChannel> {
        UsersClient::with_interceptor(self.channel.clone(), self.auth.clone())
            .max_decoding_message_size(MAX_REPLY_BYTES)
            .max_encoding_message_size(MAX_REQUEST_BYTES)
    }

    /// The own units of a holdout's regression targets ([`super::show::Units`]), for views
    /// that show released intervals; empty when the holdout cannot be read (the view itself
    /// then reports why) or has no regression target.
    pub async fn units(&self, holdout: &str) -> super::show::Units {
        self.holdout_info(holdout)
            .await
            .map_or_else(super::show::Units::default, |i| {
                super::show::Units::of(&i.targets)
            })
    }

    /// The holdout's public facts as the caller may see them, for views that add its targets'
    /// units or its delta to another reply; `None` when it cannot be read (the view itself
    /// then reports why).
    pub async fn holdout_info(&self, holdout: &str) -> Option<crate::proto::v1::HoldoutInfo> {
        self.holdouts()
            .get_holdout(crate::proto::v1::GetHoldoutRequest {
                name: holdout.to_string(),
            })
            .await
            .ok()
            .map(tonic::Response::into_inner)
    }

    /// Wraps a failed call. The connection was open when the call began ([`Conn::open`]
    /// connects eagerly), so a status that comes from the transport rather than from the daemon
    /// means the connection broke with the request on its way or in the daemon's hands: the
    /// outcome is unknown (exit code 10), and the message says how to retry safely.
    pub fn fail(&self, status: Status) -> anyhow::Error {
        let from_transport = std::error::Error::source(&status).is_some()
            && matches!(
                status.code(),
                tonic::Code::Unavailable | tonic::Code::Unknown | tonic::Code::Cancelled
            );
        let lost = matches!(
            status.code(),
            tonic::Code::Unavailable | tonic::Code::DeadlineExceeded
        );
        let err = anyhow::Error::new(status);
        if from_transport {
            err.context(OutcomeUnknown {
                url: self.url.clone(),
            })
        } else if lost {
            err.context(format!("lost the daemon at {}", self.url))
        } else {
            err
        }
    }
}

/// The connection to the daemon broke after a request was sent: the daemon may or may not have
/// recorded it (exit code 10).
#[derive(Debug, Clone)]
pub struct OutcomeUnknown {
    /// The daemon's address.
    pub url: String,
}

impl std::error::Error for OutcomeUnknown {}

impl std::fmt::Display for OutcomeUnknown {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "the connection to {} broke after the request was sent, so it may or may not have \
             been recorded; retry with the same file (and the same --request-id if you gave \
             one): the same file from the same team is never charged twice",
            self.url
        )
    }
}

/// The message printed after `error: `: contexts, then a status's own message (not its debug
/// form), then the causes of anything else.
pub fn describe(err: &anyhow::Error) -> String {
    let mut parts: Vec<String> = Vec::new();
    for cause in err.chain() {
        if let Some(status) = cause.downcast_ref::<Status>() {
            let message = if status.message().is_empty() {
                status.code().description().to_string()
            } else {
                status.message().to_string()
            };
            parts.push(message);
            break;
        }
        let text = cause.to_string();
        if parts.last() != Some(&text) {
            parts.push(text);
        }
    }
    parts.join(": ")
}
