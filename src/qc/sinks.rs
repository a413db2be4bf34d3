//! Alert delivery: a command run directly (never through a shell), an HTTP
//! webhook, an append-only JSON-lines file.
//!
//! Each configured sink has its own thread fed by a bounded queue, so a slow or
//! dead receiver delays nothing but its own deliveries; when a queue is full the
//! event is dropped for that sink and logged (it is stored in the database
//! anyway). Deciding what to send is the monitor's.

use std::io::{Read, Write};
use std::net::{TcpStream, ToSocketAddrs};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, Sender, TrySendError};

use crate::qc::alerts::AlertEvent;
use crate::qc::params::{AlertSettings, CommandSink, WebhookSink};

/// Events waiting per sink before new ones are dropped for it.
const QUEUE_CAPACITY: usize = 256;

/// The running sinks. Dropping the value without [`AlertDispatcher::close`]
/// lets the threads finish their queues on their own.
pub struct AlertDispatcher {
    queues: Vec<(&'static str, Sender<AlertEvent>)>,
    threads: Vec<JoinHandle<()>>,
}

enum Sink {
    Command(CommandSink),
    Webhook(WebhookSink),
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

    fn deliver(&self, event: &AlertEvent) -> Result<(), String> {
        match self {
            Sink::Command(c) => run_command(c, event),
            Sink::Webhook(w) => post_with_retries(w, event),
            Sink::File(path) => append_line(path, event),
        }
    }
}

impl AlertDispatcher {
    /// Starts one thread per configured sink (none when nothing is configured).
    ///
    /// # Errors
    /// A thread that cannot be started.
    pub fn start(settings: &AlertSettings) -> std::io::Result<AlertDispatcher> {
        let sinks = settings
            .command
            .clone()
            .map(Sink::Command)
            .into_iter()
            .chain(settings.webhook.clone().map(Sink::Webhook))
            .chain(settings.file.clone().map(Sink::File));
        let mut dispatcher = AlertDispatcher {
            queues: Vec::new(),
            threads: Vec::new(),
        };
        for sink in sinks {
            let (event_tx, event_rx) = crossbeam_channel::bounded(QUEUE_CAPACITY);
            let name = sink.name();
            let thread = std::thread::Builder::new()
                .name(format!("alert-{name}"))
                .spawn(move || deliver_loop(&sink, &event_rx))?;
            dispatcher.queues.push((name, event_tx));
            dispatcher.threads.push(thread);
        }
        Ok(dispatcher)
    }

    /// Hands `event` to every sink without waiting.
    pub fn send(&self, event: &AlertEvent) {
        for (name, queue) in &self.queues {
            match queue.try_send(event.clone()) {
                Ok(()) => {}
                Err(TrySendError::Full(_)) => tracing::warn!(
                    "alert sink {name} is {QUEUE_CAPACITY} events behind; dropped {} for it",
                    event.condition
                ),
                Err(TrySendError::Disconnected(_)) => {
                    tracing::error!(
                        "alert sink {name} has stopped; {} not sent",
                        event.condition
                    )
                }
            }
        }
    }

    /// Stops taking events and waits for the queues to drain (each delivery is
    /// bounded by its sink's timeouts and retries).
    pub fn close(self) {
        drop(self.queues);
        for t in self.threads {
            if t.join().is_err() {
                tracing::error!("an alert sink thread panicked");
            }
        }
    }
}

fn deliver_loop(sink: &Sink, event_rx: &Receiver<AlertEvent>) {
    while let Ok(event) = event_rx.recv() {
        match sink.deliver(&event) {
            Ok(()) => tracing::debug!("alert {} sent to {}", event.condition, sink.name()),
            Err(e) => tracing::warn!(
                "alert {} could not be sent to the {} sink: {e}",
                event.condition,
                sink.name()
            ),
        }
    }
}

/// The JSON document every sink receives.
pub fn to_json(event: &AlertEvent) -> String {
    // A struct of strings, numbers and an enum: serialising cannot fail.
    serde_json::to_string(event).unwrap_or_default()
}

/// Runs the program with its fixed arguments; the alert goes only to stdin and
/// the environment, so no file name or message can become a command.
fn run_command(c: &CommandSink, event: &AlertEvent) -> Result<(), String> {
    let mut child = Command::new(&c.program)
        .args(&c.args)
        .env("FRAMEWARDEN_ALERT_CONDITION", &event.condition)
        .env("FRAMEWARDEN_ALERT_STATE", event.state.as_str())
        .env("FRAMEWARDEN_ALERT_MESSAGE", &event.message)
        .env(
            "FRAMEWARDEN_ALERT_FILE",
            event.file.as_deref().unwrap_or(""),
        )
        .env("FRAMEWARDEN_ALERT_AT", event.at_ms.to_string())
        .stdin(Stdio::piped())
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .map_err(|e| format!("cannot start {}: {e}", c.program))?;
    if let Some(mut stdin) = child.stdin.take() {
        // A program that does not read its input closes the pipe: not an error.
        let _ = stdin.write_all(to_json(event).as_bytes());
        let _ = stdin.write_all(b"\n");
    }
    let deadline = Instant::now() + c.timeout;
    loop {
        match child.try_wait() {
            Ok(Some(status)) if status.success() => return Ok(()),
            Ok(Some(status)) => return Err(format!("{} exited with {status}", c.program)),
            Ok(None) if Instant::now() >= deadline => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!(
                    "{} still running after {} s; killed",
                    c.program,
                    c.timeout.as_secs()
                ));
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(20)),
            Err(e) => return Err(format!("waiting for {}: {e}", c.program)),
        }
    }
}

fn post_with_retries(w: &WebhookSink, event: &AlertEvent) -> Result<(), String> {
    let body = to_json(event);
    let mut delay = w.backoff;
    let mut last_error = String::new();
    for attempt in 0..=w.retries {
        if attempt > 0 {
            std::thread::sleep(delay);
            delay = delay.saturating_mul(2);
        }
        match post_once(&w.url, &body, w.timeout, w.ca_file.as_deref()) {
            Ok(()) => return Ok(()),
            Err(e) => {
                tracing::debug!("webhook attempt {} failed: {e}", attempt + 1);
                last_error = e;
            }
        }
    }
    Err(format!(
        "{} attempts failed, the last: {last_error}",
        w.retries + 1
    ))
}

/// One HTTP/1.1 POST, over plain TCP for `http://` or TLS for `https://`
/// (trusting the Mozilla roots bundled by `webpki-roots` plus the certificates in
/// `ca_file`); success is a 2xx status line.
///
/// # Errors
/// A message naming what failed: the address, the connection, TLS, or the status.
pub fn post_once(
    url: &str,
    body: &str,
    timeout: Duration,
    ca_file: Option<&Path>,
) -> Result<(), String> {
    let (tls, rest) = if let Some(rest) = url.strip_prefix("https://") {
        (true, rest)
    } else if let Some(rest) = url.strip_prefix("http://") {
        (false, rest)
    } else {
        return Err(format!("{url}: only http:// and https:// are supported"));
    };
    let (authority, path) = rest.split_at(rest.find('/').unwrap_or(rest.len()));
    let path = if path.is_empty() { "/" } else { path };
    // `host:port`, `host`, `[v6]:port` or `[v6]`.
    let (host, port) = match authority.rsplit_once(':') {
        Some((h, p)) if !p.contains(']') => (
            h,
            p.parse::<u16>()
                .map_err(|e| format!("{authority}: port: {e}"))?,
        ),
        _ => (authority, if tls { 443 } else { 80 }),
    };
    let host = host.trim_start_matches('[').trim_end_matches(']');
    let tcp = connect(host, port, timeout)?;
    tcp.set_read_timeout(Some(timeout))
        .and_then(|()| tcp.set_write_timeout(Some(timeout)))
        .map_err(|e| e.to_string())?;
    let request = format!(
        "POST {path} HTTP/1.1\r\nHost: {authority}\r\nUser-Agent: framewarden/{}\r\nContent-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        env!("CARGO_PKG_VERSION"),
        body.len()
    );
    if tls {
        let name = rustls::pki_types::ServerName::try_from(host.to_string())
            .map_err(|e| format!("{host}: {e}"))?;
        let conn = rustls::ClientConnection::new(client_config(ca_file)?, name)
            .map_err(|e| format!("TLS: {e}"))?;
        exchange(&mut rustls::StreamOwned::new(conn, tcp), &request)
    } else {
        exchange(&mut { tcp }, &request)
    }
}

/// Connects to the first address of `host` that answers within `timeout`.
fn connect(host: &str, port: u16, timeout: Duration) -> Result<TcpStream, String> {
    let addrs: Vec<_> = (host, port)
        .to_socket_addrs()
        .map_err(|e| format!("{host}: {e}"))?
        .collect();
    let mut last = format!("{host}: no address");
    for addr in addrs {
        match TcpStream::connect_timeout(&addr, timeout) {
            Ok(s) => return Ok(s),
            Err(e) => last = format!("connect {addr}: {e}"),
        }
    }
    Err(last)
}

/// Sends the request and reads the status line.
fn exchange(stream: &mut (impl Read + Write), request: &str) -> Result<(), String> {
    stream
        .write_all(request.as_bytes())
        .and_then(|()| stream.flush())
        .map_err(|e| format!("send: {e}"))?;
    let mut head = [0u8; 64];
    let mut got = 0;
    while got < 12 {
        match stream.read(&mut head[got..]) {
            Ok(0) => break,
            Ok(n) => got += n,
            Err(e) => return Err(format!("no answer: {e}")),
        }
    }
    let line = String::from_utf8_lossy(&head[..got]);
    let status = line
        .strip_prefix("HTTP/1.")
        .and_then(|s| s.get(2..5))
        .and_then(|s| s.parse::<u16>().ok())
        .ok_or_else(|| format!("not an HTTP answer: {line:?}"))?;
    if (200..300).contains(&status) {
        Ok(())
    } else {
        Err(format!("HTTP status {status}"))
    }
}

/// TLS client settings: safe default protocol versions, ring's primitives, and
/// the bundled roots plus the certificates of `ca_file` (PEM).
fn client_config(ca_file: Option<&Path>) -> Result<Arc<rustls::ClientConfig>, String> {
    use rustls::pki_types::{pem::PemObject, CertificateDer};
    let mut roots = rustls::RootCertStore {
        roots: webpki_roots::TLS_SERVER_ROOTS.to_vec(),
    };
    if let Some(path) = ca_file {
        let certs =
            CertificateDer::pem_file_iter(path).map_err(|e| format!("{}: {e}", path.display()))?;
        for cert in certs {
            let cert = cert.map_err(|e| format!("{}: {e}", path.display()))?;
            roots
                .add(cert)
                .map_err(|e| format!("{}: {e}", path.display()))?;
        }
    }
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .map_err(|e| format!("TLS: {e}"))?
        .with_root_certificates(roots)
        .with_no_client_auth();
    Ok(Arc::new(config))
}

fn append_line(path: &Path, event: &AlertEvent) -> Result<(), String> {
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .map_err(|e| format!("{}: {e}", path.display()))?;
    // One write per line: with O_APPEND a line lands whole at the end.
    let line = format!("{}\n", to_json(event));
    file.write_all(line.as_bytes())
        .map_err(|e| format!("{}: {e}", path.display()))
}
