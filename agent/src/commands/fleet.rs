//! `leaktally fleet`: the read-only central view of every site that
//! publishes to an MQTT broker (`crate::fleet`).
//!
//! Checks the options (the broker's address, the CA and password files,
//! the listen address) before anything runs, so a mistake stops it at once
//! with what, where and how to fix it; then serves the page while the
//! connection keeps trying the broker, for as long as it takes.

use super::args::path_arg;
use crate::fleet::board::Board;
use crate::fleet::http::{self, Shared};
use crate::fleet::mqtt::{self, Broker, Link};
use crate::fleet::topics;
use std::future::Future;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use tokio_util::sync::CancellationToken;
use tracing::{info, warn};

/// The page's default address: beside the agent's (8470), on loopback.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:8480";

/// `leaktally fleet`'s options.
#[derive(Debug, Clone, clap::Args)]
pub struct FleetArgs {
    /// The MQTT broker the sites publish to, HOST or HOST:PORT (port 1883,
    /// or 8883 with --tls-ca, when not given).
    #[arg(long, value_name = "HOST[:PORT]")]
    pub mqtt: String,
    /// Connect with TLS, trusting the CA certificates in this PEM file.
    #[arg(long, value_name = "FILE", value_parser = path_arg)]
    pub tls_ca: Option<PathBuf>,
    /// A client certificate (PEM) to show a broker that asks for one (with
    /// --tls-key and --tls-ca).
    #[arg(long, value_name = "FILE", value_parser = path_arg, requires_all = ["tls_key", "tls_ca"])]
    pub tls_cert: Option<PathBuf>,
    /// The client certificate's private key (PEM; keep it 0600).
    #[arg(long, value_name = "FILE", value_parser = path_arg, requires = "tls_cert")]
    pub tls_key: Option<PathBuf>,
    /// The user name to give the broker (with --password-file).
    #[arg(long, value_name = "USER", requires = "password_file")]
    pub username: Option<String>,
    /// A file holding the broker password on its first line (never the
    /// password itself on the command line, where `ps` would show it).
    #[arg(long, value_name = "FILE", value_parser = path_arg, requires = "username")]
    pub password_file: Option<PathBuf>,
    /// The MQTT client id; unique per broker (default
    /// leaktally-fleet-PID).
    #[arg(long, value_name = "ID")]
    pub client_id: Option<String>,
    /// The topic prefix the sites publish under (their `[mqtt]
    /// topic_prefix`).
    #[arg(long, value_name = "PREFIX", default_value = "leaktally")]
    pub topic_prefix: String,
    /// Where to serve the page, /api/fleet and /metrics.
    #[arg(long, value_name = "ADDR:PORT", default_value = DEFAULT_LISTEN)]
    pub listen: SocketAddr,
    /// Allow --listen on an address other machines can reach (the page has
    /// no login; keep it on a trusted network).
    #[arg(long)]
    pub allow_remote: bool,
    /// Flag an open event whose latest sample is older than this, seconds.
    #[arg(long, value_name = "SECONDS", default_value_t = 60)]
    pub stale_after_s: u32,
}

/// The broker from the options: address, TLS, credentials; every file read
/// and checked now.
pub fn broker(args: &FleetArgs) -> anyhow::Result<Broker> {
    let (host, port) = host_port(&args.mqtt, args.tls_ca.is_some())?;
    let prefix = args.topic_prefix.trim_end_matches('/');
    if prefix.is_empty()
        || prefix.contains(['+', '#', '\0'])
        || prefix.starts_with('$')
        || prefix.starts_with('/')
    {
        anyhow::bail!(
            "--topic-prefix {:?} is not a topic prefix: give the sites' [mqtt] topic_prefix, such as leaktally or corp/leaktally (no +, #, leading / or $)",
            crate::logging::one_line(&args.topic_prefix)
        );
    }
    let password = match &args.password_file {
        None => None,
        Some(file) => {
            let text = std::fs::read_to_string(file).map_err(|e| {
                anyhow::anyhow!(
                    "cannot read the password file {}: {e}; give --password-file a file holding the broker password on its first line, readable by this user",
                    file.display()
                )
            })?;
            #[cfg(unix)]
            {
                use std::os::unix::fs::PermissionsExt;
                if let Ok(meta) = std::fs::metadata(file)
                    && meta.permissions().mode() & 0o004 != 0
                {
                    warn!(
                        "the password file {} is readable by every user; chmod o-r it",
                        file.display()
                    );
                }
            }
            let password = text.lines().next().unwrap_or("").to_owned();
            Some((password, file.clone()))
        }
    };
    let client_id = args
        .client_id
        .clone()
        .unwrap_or_else(|| format!("leaktally-fleet-{}", std::process::id()));
    if client_id.is_empty() || client_id.len() > 65_535 {
        anyhow::bail!("--client-id must not be empty; give the view an id unique on the broker");
    }
    Ok(Broker {
        host,
        port,
        tls_ca: args.tls_ca.clone(),
        tls_client: args.tls_cert.clone().zip(args.tls_key.clone()),
        username: args.username.clone(),
        password,
        client_id,
        prefix: prefix.to_owned(),
    })
}

/// `HOST`, `HOST:PORT`, `[V6]` or `[V6]:PORT`.
fn host_port(text: &str, tls: bool) -> anyhow::Result<(String, u16)> {
    let default = if tls { 8883 } else { 1883 };
    let bad = || {
        anyhow::anyhow!(
            "--mqtt {:?} is not a broker address: give HOST or HOST:PORT, such as broker.example:1883 or [::1]:8883",
            crate::logging::one_line(text)
        )
    };
    let (host, port) = if let Some(rest) = text.strip_prefix('[') {
        let (host, after) = rest.split_once(']').ok_or_else(bad)?;
        match after.strip_prefix(':') {
            Some(port) => (host, Some(port)),
            None if after.is_empty() => (host, None),
            None => return Err(bad()),
        }
    } else {
        match text.rsplit_once(':') {
            Some((host, port)) if !host.contains(':') => (host, Some(port)),
            Some(_) => return Err(bad()),
            None => (text, None),
        }
    };
    if host.is_empty() || host.contains(char::is_whitespace) {
        return Err(bad());
    }
    let port = match port {
        None => default,
        Some(p) => p.parse::<u16>().ok().filter(|&p| p > 0).ok_or_else(bad)?,
    };
    Ok((host.to_owned(), port))
}

/// Runs `leaktally fleet` as the command line gave it, until a stop
/// signal.
pub fn command(args: FleetArgs) -> anyhow::Result<()> {
    super::args::runtime()?.block_on(run(args, crate::shutdown::signalled()))
}

/// Runs the view until `stop` completes.
pub async fn run(args: FleetArgs, stop: impl Future<Output = ()>) -> anyhow::Result<()> {
    let broker = broker(&args)?;
    let options = broker.options()?;
    if !args.listen.ip().is_loopback() && !args.allow_remote {
        anyhow::bail!(
            "--listen {} can be reached from other machines, and the page has no login; add --allow-remote to mean it, or listen on 127.0.0.1",
            args.listen
        );
    }
    let listener = tokio::net::TcpListener::bind(args.listen).await.map_err(|e| {
        anyhow::anyhow!(
            "cannot serve the fleet view on {}: {e}; choose another --listen address (or stop whatever uses that port)",
            args.listen
        )
    })?;
    let bound = listener.local_addr()?;
    info!(
        "fleet view on http://{bound}/ (JSON at /api/fleet, metrics at /metrics), reading {}/# on the broker at {}",
        broker.prefix,
        broker.address()
    );
    if !bound.ip().is_loopback() {
        warn!(
            "the fleet view listens on {bound}, which other machines can reach; it is read-only but has no login, so keep it on a trusted network"
        );
    }
    let board = Arc::new(Mutex::new(Board::new(&broker.prefix)));
    let link = Arc::new(Link::default());
    let shared = Arc::new(Shared::new(
        Arc::clone(&board),
        Arc::clone(&link),
        broker.address(),
        broker.prefix.clone(),
        i64::from(args.stale_after_s) * 1000,
        bound,
    ));
    debug_assert!(topics::filters(&broker.prefix).len() == 3);
    let cancel = CancellationToken::new();
    let subscriber = tokio::spawn(mqtt::run(broker, options, board, link, cancel.clone()));
    let server = tokio::spawn(http::serve(listener, shared, cancel.clone()));
    stop.await;
    info!("fleet view stopping");
    cancel.cancel();
    let _ = subscriber.await;
    let _ = server.await;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn broker_addresses() {
        assert_eq!(
            host_port("b.example", false).unwrap(),
            ("b.example".into(), 1883)
        );
        assert_eq!(
            host_port("b.example", true).unwrap(),
            ("b.example".into(), 8883)
        );
        assert_eq!(
            host_port("127.0.0.1:1999", false).unwrap(),
            ("127.0.0.1".into(), 1999)
        );
        assert_eq!(
            host_port("[::1]:1999", false).unwrap(),
            ("::1".into(), 1999)
        );
        assert_eq!(host_port("[::1]", true).unwrap(), ("::1".into(), 8883));
        for bad in [
            "", ":1883", "b:0", "b:x", "b:70000", "::1:1883", "[::1", "[::1]x", "a b:1",
        ] {
            let e = host_port(bad, false).unwrap_err().to_string();
            assert!(e.contains("is not a broker address"), "{bad}: {e}");
        }
    }
}
