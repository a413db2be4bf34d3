//! Alert delivery: a command run directly (never through a shell), an HTTP
//! webhook, an append-only JSON-lines file.
//!
//! Each configured sink has its own thread fed by a bounded queue, so a slow or
//! dead receiver delays nothing but its own deliveries; when a queue is full the
//! event is dropped for that sink and logged (it is stored in the database
//! anyway). Deciding what to send is the monitor's.
//!
//! A delivery the recorder stored (see [`crate::qc::recorder`]) carries its
//! row's id, and its outcome comes back through [`AlertDispatcher::outcomes`];
//! one cut short by [`AlertDispatcher::close`] reports none, so its row stays
//! pending and the next start sends it again.
//!
//! A command runs in a process group of its own: at its timeout, or when the
//! dispatcher closes, the whole group is killed, children included.
//!
//! The webhook is posted with `ureq` over rustls (ring's primitives); its URL and
//! extra CA certificates are checked when the configuration loads
//! ([`WebhookUrl`], [`CaFile`]), and its HTTP agent is made once, when the
//! dispatcher starts ([`WebhookClient`]).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, ExitStatus, Stdio};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, RecvTimeoutError, Sender, TryRecvError, TrySendError};
use rustls::pki_types::{pem::PemObject, CertificateDer};

use crate::qc::alerts::AlertEvent;
use crate::qc::params::{AlertSettings, CommandSink, WebhookSink};
use crate::text::Repeats;

/// What went wrong with a sink: a delivery that failed, or (when the
/// configuration loads) a webhook URL or CA file that cannot be used. Each
/// message names what failed; webhook messages name the server by `host:port`
/// only, since a webhook's path often carries its secret.
#[derive(Debug, thiserror::Error)]
pub enum SinkError {
    /// The command could not be started.
    #[error("cannot start {program}: {source}")]
    CommandStart {
        /// The program.
        program: String,
        /// The cause.
        source: std::io::Error,
    },
    /// The command ended with a failure status.
    #[error("{program} exited with {status}")]
    CommandFailed {
        /// The program.
        program: String,
        /// Its exit status.
        status: ExitStatus,
    },
    /// The command ran past its timeout and was killed.
    #[error("{program} still running after {} s; killed", .timeout.as_secs())]
    CommandTimeout {
        /// The program.
        program: String,
        /// `command_timeout_s`.
        timeout: Duration,
    },
    /// The service is stopping: the delivery was cut short (a command's
    /// process group killed, a webhook's retries dropped) and is left for the
    /// next start.
    #[error("cut short: the service is stopping")]
    Interrupted,
    /// Waiting for the command failed.
    #[error("waiting for {program}: {source}")]
    CommandWait {
        /// The program.
        program: String,
        /// The cause.
        source: std::io::Error,
    },

    /// A CA file that cannot be read or holds no usable certificate (found when
    /// the configuration loads).
    #[error("{}: {reason}", .path.display())]
    CaFile {
        /// The CA file.
        path: PathBuf,
        /// What is wrong with it.
        reason: String,
    },

    /// The webhook's host name has no address.
    #[error("webhook host {host}: no address found")]
    WebhookAddress {
        /// The host name.
        host: String,
    },
    /// No connection to the webhook's server.
    #[error("webhook: connect {address}: {source}")]
    WebhookConnect {
        /// `host:port`.
        address: String,
        /// The cause.
        source: std::io::Error,
    },
    /// The TLS handshake failed (an unknown certificate, for instance).
    #[error("webhook {address}: TLS: {reason}")]
    WebhookTls {
        /// `host:port`.
        address: String,
        /// The TLS library's reason.
        reason: String,
    },
    /// An attempt ran past `webhook_timeout_s`.
    #[error("webhook {address}: no {waiting_for} within {} ms", .after.as_millis())]
    WebhookTimeout {
        /// `host:port`.
        address: String,
        /// "connection" (address lookup, TCP and TLS) or "answer".
        waiting_for: &'static str,
        /// The bound that ran out.
        after: Duration,
    },
    /// The server answered with a status other than 2xx.
    #[error("webhook {address}: HTTP status {status}")]
    WebhookStatus {
        /// `host:port`.
        address: String,
        /// The HTTP status.
        status: u16,
    },
    /// The exchange failed otherwise (a malformed answer, a reset).
    #[error("webhook {address}: {reason}")]
    WebhookExchange {
        /// `host:port`.
        address: String,
        /// The HTTP client's reason.
        reason: String,
    },
    /// Every attempt failed.
    #[error("{attempts} attempts failed, the last: {last}")]
    WebhookGaveUp {
        /// Attempts made (1 + retries).
        attempts: u32,
        /// The last attempt's error.
        last: Box<SinkError>,
    },

    /// A sink's delivery thread could not be started.
    #[error("cannot start the {sink} sink's thread: {source}")]
    Thread {
        /// `command`, `webhook` or `file`.
        sink: &'static str,
        /// The cause.
        source: std::io::Error,
    },
    /// The alert file could not be written.
    #[error("alert file {}: {source}", .path.display())]
    File {
        /// The alert file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
}

/// Events waiting per sink before new ones are dropped for it.
const QUEUE_CAPACITY: usize = 256;

/// How long [`AlertDispatcher::close`] lets the sinks work through their
/// queues before it cuts the deliveries short.
pub const CLOSE_GRACE: Duration = Duration::from_secs(2);

/// How long [`AlertDispatcher::close`] then waits for a delivery it cut short
/// (a webhook attempt cannot be interrupted; it ends at its own timeout).
const CLOSE_CUT: Duration = Duration::from_millis(500);

/// One event for one sink; `id` is the row of the delivery when the recorder
/// stored it (its outcome is then reported), `None` when nobody tracks it.
struct Delivery {
    id: Option<i64>,
    event: AlertEvent,
}

/// The outcome of a stored delivery, for its row.
#[derive(Debug)]
pub struct Outcome {
    /// The delivery's row.
    pub id: i64,
    /// `Ok` when it was delivered, else why every attempt failed.
    pub result: Result<(), String>,
}

/// The running sinks. Dropping the value without [`AlertDispatcher::close`]
/// lets the threads finish their queues on their own.
pub struct AlertDispatcher {
    queues: Vec<(&'static str, Sender<Delivery>)>,
    threads: Vec<JoinHandle<()>>,
    /// Dropped by [`AlertDispatcher::close`] after its grace: every sink
    /// thread then stops.
    stop: Option<Sender<()>>,
    outcomes: Receiver<Outcome>,
    /// Events dropped for a sink, logged limited.
    repeats: Repeats,
}

enum Sink {
    Command(CommandSink),
    Webhook(WebhookClient),
    File(PathBuf),
}

impl Sink {
    fn name(&self) -> &'static str {
        match self {
            Sink::Command(_) => "command",
            Sink::Webhook(_) => "webhook",
            Sink::File(_) => "file",
        }
    }

    fn deliver(&self, event: &AlertEvent, stop: &Receiver<()>) -> Result<(), SinkError> {
        match self {
            Sink::Command(c) => run_command(c, event, stop),
            Sink::Webhook(w) => w.post_with_retries(event, stop),
            Sink::File(path) => append_line(path, event),
        }
    }
}

impl AlertDispatcher {
    /// Starts one thread per configured sink (none when nothing is configured);
    /// a webhook's HTTP agent is made here, once.
    ///
    /// # Errors
    /// A webhook CA file that cannot be used, or a thread that cannot be started.
    pub fn start(settings: &AlertSettings) -> Result<AlertDispatcher, SinkError> {
        let webhook = settings
            .webhook
            .as_ref()
            .map(WebhookClient::new)
            .transpose()?;
        let sinks = settings
            .command
            .clone()
            .map(Sink::Command)
            .into_iter()
            .chain(webhook.map(Sink::Webhook))
            .chain(settings.file.clone().map(Sink::File));
        let (stop_tx, stop_rx) = crossbeam_channel::bounded(0);
        let (outcome_tx, outcome_rx) = crossbeam_channel::unbounded();
        let mut dispatcher = AlertDispatcher {
            queues: Vec::new(),
            threads: Vec::new(),
            stop: Some(stop_tx),
            outcomes: outcome_rx,
            repeats: Repeats::default(),
        };
        for sink in sinks {
            let (event_tx, event_rx) = crossbeam_channel::bounded(QUEUE_CAPACITY);
            let name = sink.name();
            let (stop_rx, outcome_tx) = (stop_rx.clone(), outcome_tx.clone());
            let thread = std::thread::Builder::new()
                .name(format!("alert-{name}"))
                .spawn(move || deliver_loop(&sink, &event_rx, &stop_rx, &outcome_tx))
                .map_err(|source| SinkError::Thread { sink: name, source })?;
            dispatcher.queues.push((name, event_tx));
            dispatcher.threads.push(thread);
        }
        Ok(dispatcher)
    }

    /// The configured sinks' names (`command`, `webhook`, `file`), in the
    /// order they are started.
    pub fn sink_names(&self) -> Vec<&'static str> {
        self.queues.iter().map(|(name, _)| *name).collect()
    }

    /// Hands `event` to every sink without waiting; nobody tracks the outcome.
    pub fn send(&self, event: &AlertEvent) {
        for (name, _) in &self.queues {
            self.send_to(name, None, event);
        }
    }

    /// Hands `event` to the sink `name` without waiting, as the delivery of
    /// row `id`, whose outcome is then reported through
    /// [`AlertDispatcher::outcomes`]. A sink not configured is skipped.
    pub fn send_to(&self, name: &str, id: Option<i64>, event: &AlertEvent) {
        let Some((name, queue)) = self.queues.iter().find(|(n, _)| *n == name) else {
            return;
        };
        let delivery = Delivery {
            id,
            event: event.clone(),
        };
        match queue.try_send(delivery) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => self.repeats.warn(
                "sink queue full",
                format_args!(
                    "alert sink {name} is {QUEUE_CAPACITY} events behind; dropped {} for it",
                    event.condition
                ),
            ),
            Err(TrySendError::Disconnected(_)) => self.repeats.error(
                "sink stopped",
                format_args!(
                    "alert sink {name} has stopped; {} not sent",
                    event.condition
                ),
            ),
        }
    }

    /// The outcomes of tracked deliveries finished since the last call.
    pub fn outcomes(&self) -> Vec<Outcome> {
        self.outcomes.try_iter().collect()
    }

    /// Stops taking events, lets the sinks work through their queues for
    /// [`CLOSE_GRACE`], then cuts short what is left: a running command's
    /// process group is killed, a webhook's retries are dropped, queued
    /// events are not sent. A thread still in a webhook attempt after a
    /// further moment is left to end on its own. Returns the outcomes of
    /// tracked deliveries not yet taken; a delivery cut short has none.
    pub fn close(mut self) -> Vec<Outcome> {
        drop(std::mem::take(&mut self.queues));
        let threads = std::mem::take(&mut self.threads);
        let finished = |threads: &[JoinHandle<()>], within: Duration| {
            let deadline = Instant::now() + within;
            while threads.iter().any(|t| !t.is_finished()) && Instant::now() < deadline {
                std::thread::sleep(Duration::from_millis(10));
            }
        };
        finished(&threads, CLOSE_GRACE);
        if threads.iter().any(|t| !t.is_finished()) {
            tracing::warn!(
                "alert sinks still busy {} s into the shutdown; the deliveries not made are sent at the next start",
                CLOSE_GRACE.as_secs()
            );
        }
        drop(self.stop.take());
        finished(&threads, CLOSE_CUT);
        for t in threads {
            if !t.is_finished() {
                continue; // in a webhook attempt: ends at its timeout
            }
            if t.join().is_err() {
                tracing::error!("an alert sink thread panicked");
            }
        }
        self.outcomes()
    }
}

/// Whether the dispatcher has told its sinks to stop.
fn stopping(stop: &Receiver<()>) -> bool {
    matches!(stop.try_recv(), Err(TryRecvError::Disconnected))
}

fn deliver_loop(
    sink: &Sink,
    deliveries: &Receiver<Delivery>,
    stop: &Receiver<()>,
    outcomes: &Sender<Outcome>,
) {
    // A sink that is down fails every event: one line per window.
    let repeats = Repeats::default();
    while let Ok(Delivery { id, event }) = deliveries.recv() {
        if stopping(stop) {
            return; // the rest stays pending
        }
        let result = sink.deliver(&event, stop);
        match &result {
            Ok(()) => tracing::debug!("alert {} sent to {}", event.condition, sink.name()),
            Err(SinkError::Interrupted) => {
                tracing::info!(
                    "alert {} to the {} sink cut short by the shutdown",
                    event.condition,
                    sink.name()
                );
                return;
            }
            Err(e) => repeats.warn(
                "delivery failed",
                format_args!(
                    "alert {} could not be sent to the {} sink: {e}",
                    event.condition,
                    sink.name()
                ),
            ),
        }
        if let Some(id) = id {
            let result = result.map_err(|e| e.to_string());
            // The dispatcher may be gone (dropped without close).
            let _ = outcomes.send(Outcome { id, result });
        }
    }
}

/// The JSON document every sink receives.
pub fn to_json(event: &AlertEvent) -> String {
    // A struct of strings, numbers and an enum: serialising cannot fail.
    serde_json::to_string(event).unwrap_or_default()
}

/// Runs the program with its fixed arguments; the alert goes only to stdin and
/// the environment, so no file name or message can become a command. The
/// program leads a process group of its own, which is killed whole at the
/// timeout or when `stop` says the service is stopping.
fn run_command(c: &CommandSink, event: &AlertEvent, stop: &Receiver<()>) -> Result<(), SinkError> {
    let mut command = Command::new(&c.program);
    #[cfg(unix)]
    std::os::unix::process::CommandExt::process_group(&mut command, 0);
    let mut child = command
        .args(&c.args)
        .env("FRAMEWARDEN_ALERT_CONDITION", &event.condition)
        .env("FRAMEWARDEN_ALERT_STATE", event.state.as_str())
        .env("FRAMEWARDEN_ALERT_MESSAGE", &event.message)
        .env(
            "FRAMEWARDEN_ALERT_FILE",
            event.file.as_deref().unwrap_or(""),
        )
        .env("FRAMEWARDEN_ALERT_AT", event.at_ms.to_string())
        .env("FRAMEWARDEN_ALERT_POSITIONS", event.positions.join(", "))
        .stdin(Stdio::piped())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .map_err(|source| SinkError::CommandStart {
            program: c.program.clone(),
            source,
        })?;
    if let Some(mut stdin) = child.stdin.take() {
        // A program that does not read its input closes the pipe: not an error.
        let _ = stdin.write_all(to_json(event).as_bytes());
        let _ = stdin.write_all(b"\n");
    }
    let deadline = Instant::now() + c.timeout;
    loop {
        match child.try_wait() {
            Ok(Some(status)) if status.success() => return Ok(()),
            Ok(Some(status)) => {
                return Err(SinkError::CommandFailed {
                    program: c.program.clone(),
                    status,
                })
            }
            Ok(None) if Instant::now() >= deadline => {
                end_group(&mut child);
                return Err(SinkError::CommandTimeout {
                    program: c.program.clone(),
                    timeout: c.timeout,
                });
            }
            Ok(None) if stopping(stop) => {
                end_group(&mut child);
                return Err(SinkError::Interrupted);
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(20)),
            Err(source) => {
                return Err(SinkError::CommandWait {
                    program: c.program.clone(),
                    source,
                })
            }
        }
    }
}

/// Kills the command and every process of its group (its children, theirs),
/// then collects the command.
fn end_group(child: &mut std::process::Child) {
    #[cfg(unix)]
    {
        let group = rustix::process::Pid::from_child(child);
        if let Err(e) = rustix::process::kill_process_group(group, rustix::process::Signal::KILL) {
            tracing::warn!("cannot end the alert command's process group: {e}");
        }
    }
    let _ = child.kill();
    let _ = child.wait();
}

/// The extra trusted CA certificates of `[alerts] webhook_ca_file` (PEM), read
/// and checked when the configuration loads.
#[derive(Debug, Clone, PartialEq)]
pub struct CaFile {
    path: PathBuf,
    certs: Vec<CertificateDer<'static>>,
}

impl CaFile {
    /// Reads every certificate of the PEM file at `path`.
    ///
    /// # Errors
    /// [`SinkError::CaFile`] naming the file: it cannot be read, is not valid
    /// PEM, holds no certificate, or holds one that cannot be a trust anchor.
    pub fn load(path: &Path) -> Result<CaFile, SinkError> {
        let failed = |reason: String| SinkError::CaFile {
            path: path.to_path_buf(),
            reason,
        };
        let pem = std::fs::read(path).map_err(|e| failed(e.to_string()))?;
        let certs = CertificateDer::pem_slice_iter(&pem)
            .collect::<Result<Vec<_>, _>>()
            .map_err(|e| failed(format!("not PEM: {e}")))?;
        if certs.is_empty() {
            return Err(failed(
                "holds no certificate (expected PEM blocks \"-----BEGIN CERTIFICATE-----\")".into(),
            ));
        }
        // The HTTP client skips certificates it cannot use as roots without a
        // word; trying each here turns that into an error at load.
        let mut roots = rustls::RootCertStore::empty();
        for (n, cert) in certs.iter().enumerate() {
            roots
                .add(cert.clone())
                .map_err(|e| failed(format!("certificate {}: {e}", n + 1)))?;
        }
        Ok(CaFile {
            path: path.to_path_buf(),
            certs,
        })
    }

    /// The certificates, in file order.
    pub fn certificates(&self) -> &[CertificateDer<'static>] {
        &self.certs
    }
}

/// The certificates an https webhook trusts: Mozilla's root list, bundled in
/// the binary by `webpki-root-certs`, plus those of the CA file.
fn trusted_roots(ca_file: Option<&CaFile>) -> Vec<ureq::tls::Certificate<'static>> {
    let extra = ca_file.map(CaFile::certificates).unwrap_or_default();
    webpki_root_certs::TLS_SERVER_ROOT_CERTS
        .iter()
        .chain(extra)
        .map(|der| ureq::tls::Certificate::from_der(der.as_ref()).to_owned())
        .collect()
}

/// A webhook ready to post to: its settings and one HTTP agent, made when the
/// dispatcher starts and used for every alert.
pub struct WebhookClient {
    sink: WebhookSink,
    agent: ureq::Agent,
}

impl WebhookClient {
    /// The agent: rustls with the trusted roots above; `timeout` bounds both the
    /// connection (lookup, TCP, TLS handshake) and each attempt as a whole; no
    /// redirect is followed and no proxy from the environment is used (the
    /// alert goes to the configured server or nowhere); one connection per
    /// attempt (alerts are rare, and a kept-alive connection would go stale).
    ///
    /// # Errors
    /// [`SinkError::CaFile`] when the CA file cannot be used.
    pub fn new(sink: &WebhookSink) -> Result<WebhookClient, SinkError> {
        let ca_file = sink.ca_file.as_deref().map(CaFile::load).transpose()?;
        let tls = ureq::tls::TlsConfig::builder()
            .provider(ureq::tls::TlsProvider::Rustls)
            .root_certs(ureq::tls::RootCerts::from(trusted_roots(ca_file.as_ref())))
            .build();
        let agent = ureq::Agent::config_builder()
            .tls_config(tls)
            .timeout_connect(Some(sink.timeout))
            .timeout_global(Some(sink.timeout))
            .http_status_as_error(false)
            .max_redirects(0)
            .proxy(None)
            .max_idle_connections(0)
            .user_agent(concat!("framewarden/", env!("CARGO_PKG_VERSION")))
            .build()
            .new_agent();
        Ok(WebhookClient {
            sink: sink.clone(),
            agent,
        })
    }

    /// One POST of `body` as `application/json`; success is a 2xx status.
    ///
    /// # Errors
    /// A [`SinkError`] naming what failed: the address, the connection, TLS, a
    /// timeout, or the status.
    pub fn post_once(&self, body: &str) -> Result<(), SinkError> {
        let response = self
            .agent
            .post(self.sink.url.uri())
            .header("Content-Type", "application/json")
            .send(body)
            .map_err(|e| self.failure(e))?;
        let status = response.status();
        if status.is_success() {
            Ok(())
        } else {
            Err(SinkError::WebhookStatus {
                address: self.sink.url.address(),
                status: status.as_u16(),
            })
        }
    }

    /// Posts the alert, retrying a failed attempt `retries` times after
    /// `backoff`, doubling the delay each time; the retries end when `stop`'s
    /// sender is dropped (the service is stopping).
    ///
    /// # Errors
    /// The only attempt's error, [`SinkError::WebhookGaveUp`] with the last,
    /// or [`SinkError::Interrupted`] when stopped between attempts.
    pub fn post_with_retries(
        &self,
        event: &AlertEvent,
        stop: &Receiver<()>,
    ) -> Result<(), SinkError> {
        let body = to_json(event);
        let mut delay = self.sink.backoff;
        let mut attempt = 1;
        loop {
            match self.post_once(&body) {
                Ok(()) => return Ok(()),
                Err(e) if attempt > self.sink.retries => {
                    return Err(if attempt == 1 {
                        e
                    } else {
                        SinkError::WebhookGaveUp {
                            attempts: attempt,
                            last: Box::new(e),
                        }
                    })
                }
                Err(e) => tracing::debug!("webhook attempt {attempt} failed: {e}"),
            }
            if let Err(RecvTimeoutError::Disconnected) = stop.recv_timeout(delay) {
                return Err(SinkError::Interrupted);
            }
            delay = delay.saturating_mul(2);
            attempt += 1;
        }
    }

    /// Names what a failed request ran into.
    fn failure(&self, e: ureq::Error) -> SinkError {
        use std::io::ErrorKind;
        let address = self.sink.url.address();
        match e {
            ureq::Error::HostNotFound => SinkError::WebhookAddress {
                host: self.sink.url.uri().host().unwrap_or_default().to_string(),
            },
            ureq::Error::Timeout(t) => SinkError::WebhookTimeout {
                address,
                waiting_for: match t {
                    ureq::Timeout::Resolve | ureq::Timeout::Connect => "connection",
                    _ => "answer",
                },
                after: self.sink.timeout,
            },
            ureq::Error::Rustls(e) => SinkError::WebhookTls {
                address,
                reason: e.to_string(),
            },
            ureq::Error::Tls(reason) => SinkError::WebhookTls {
                address,
                reason: reason.to_string(),
            },
            ureq::Error::StatusCode(status) => SinkError::WebhookStatus { address, status },
            ureq::Error::Protocol(e) => SinkError::WebhookExchange {
                address,
                reason: format!("not an HTTP answer: {e}"),
            },
            // A refused handshake reaches ureq as an I/O error carrying rustls's.
            ureq::Error::Io(e) => match e.get_ref().and_then(|i| i.downcast_ref::<rustls::Error>())
            {
                Some(tls) => SinkError::WebhookTls {
                    address,
                    reason: tls.to_string(),
                },
                None if matches!(
                    e.kind(),
                    ErrorKind::ConnectionRefused
                        | ErrorKind::HostUnreachable
                        | ErrorKind::NetworkUnreachable
                        | ErrorKind::NetworkDown
                        | ErrorKind::AddrNotAvailable
                ) =>
                {
                    SinkError::WebhookConnect { address, source: e }
                }
                None => SinkError::WebhookExchange {
                    address,
                    reason: format!("connection lost: {e}"),
                },
            },
            other => SinkError::WebhookExchange {
                address,
                reason: other.to_string(),
            },
        }
    }
}

fn append_line(path: &Path, event: &AlertEvent) -> Result<(), SinkError> {
    let failed = |source| SinkError::File {
        path: path.to_path_buf(),
        source,
    };
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .map_err(failed)?;
    // One write per line: with O_APPEND a line lands whole at the end.
    let line = format!("{}\n", to_json(event));
    file.write_all(line.as_bytes()).map_err(failed)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_bundled_root_reaches_the_tls_settings() {
        // The client adds roots with rustls's add_parsable_certificates, which
        // skips what it cannot parse: none of the bundled list may be skipped.
        let roots = trusted_roots(None);
        assert_eq!(roots.len(), webpki_root_certs::TLS_SERVER_ROOT_CERTS.len());
        assert!(roots.len() > 100, "{} roots", roots.len());
        let mut store = rustls::RootCertStore::empty();
        let (added, ignored) =
            store.add_parsable_certificates(roots.iter().map(|c| CertificateDer::from(c.der())));
        assert_eq!((added, ignored), (roots.len(), 0));
    }
}
