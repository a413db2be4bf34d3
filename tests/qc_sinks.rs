//! Alert sinks against real receivers: a tiny HTTP server on 127.0.0.1 (answering,
//! erroring, slow, down), real child processes fed hostile file names, and a
//! real append-only file; and the webhook settings checked when the
//! configuration loads. Only loopback traffic; every wait is bounded.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpListener;
use std::path::Path;
use std::sync::mpsc;
use std::time::Duration;

use framewarden::qc::alerts::{AlertEvent, AlertState, PositionEvidence};
use framewarden::qc::params::{AlertSettings, CommandSink, WebhookSink};
use framewarden::qc::sinks::{AlertDispatcher, SinkError, WebhookClient};

#[allow(dead_code)]
mod watch_support;
#[cfg(target_os = "linux")]
use watch_support::{process_runs, wait_for, Bench};

fn event(file: &str) -> AlertEvent {
    AlertEvent {
        condition: "drift:background_level".into(),
        state: AlertState::Opened,
        at_ms: 1_700_000_000_000,
        opened_at_ms: 1_700_000_000_000,
        file: Some(file.into()),
        // Positions come from file names too: a hostile one among them.
        positions: vec!["A01".into(), HOSTILE_POSITION.into()],
        evidence: Some(PositionEvidence {
            position: "A01".into(),
            message: "3250 against a baseline of 6500".into(),
        }),
        message: format!("background level drifting down at A01 ({file})"),
    }
}

/// A position name (from a file name) that would run something in a shell.
const HOSTILE_POSITION: &str = "B02 site $(touch PWNED5); `touch PWNED6`";

/// Names that would run something if they ever reached a shell.
const HOSTILE: &str = "A01 t0001 \"q\" 'x'; touch PWNED; $(touch PWNED2) `touch PWNED3`.tif";

/// A one-thread HTTP server on 127.0.0.1: for each connection, `answer(n)` gives
/// the status to send (None: say nothing and hold the connection for `hold`).
/// Every request body is reported on the returned channel.
fn server(
    connections: usize,
    hold: Duration,
    answer: impl Fn(usize) -> Option<u16> + Send + 'static,
) -> (String, mpsc::Receiver<String>) {
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let url = format!("http://{}/hooks/night", listener.local_addr().unwrap());
    let (body_tx, body_rx) = mpsc::channel();
    std::thread::spawn(move || {
        // One thread per connection, so a held connection does not stop the next.
        for n in 0..connections {
            let Ok((stream, _)) = listener.accept() else {
                return;
            };
            let (status, body_tx) = (answer(n), body_tx.clone());
            stream
                .set_read_timeout(Some(Duration::from_secs(5)))
                .unwrap();
            std::thread::spawn(move || handle(stream, status, hold, &body_tx));
        }
    });
    (url, body_rx)
}

fn handle(
    mut stream: impl Read + Write,
    status: Option<u16>,
    hold: Duration,
    body_tx: &mpsc::Sender<String>,
) {
    let body = {
        let mut reader = BufReader::new(&mut stream);
        let mut length = 0usize;
        let mut first = String::new();
        reader.read_line(&mut first).unwrap();
        assert!(first.starts_with("POST /hooks/night HTTP/1.1"), "{first}");
        loop {
            let mut line = String::new();
            if reader.read_line(&mut line).unwrap_or(0) == 0 || line == "\r\n" {
                break;
            }
            if let Some(v) = line.to_ascii_lowercase().strip_prefix("content-length:") {
                length = v.trim().parse().unwrap();
            }
        }
        let mut body = vec![0u8; length];
        reader.read_exact(&mut body).unwrap();
        body
    };
    let _ = body_tx.send(String::from_utf8(body).unwrap());
    match status {
        Some(status) => {
            let _ = write!(
                stream,
                "HTTP/1.1 {status} X\r\nContent-Length: 0\r\nConnection: close\r\n\r\n"
            );
            let _ = stream.flush();
        }
        None => std::thread::sleep(hold),
    }
}

/// The bodies the server received: waits (bounded) until `expected` have come
/// in, since a request whose answer the client stopped waiting for may be read
/// by the server only later, then takes any extra that arrive within 200 ms.
fn bodies_received(bodies: &mpsc::Receiver<String>, expected: usize) -> Vec<String> {
    let mut got = Vec::new();
    let deadline = std::time::Instant::now() + Duration::from_secs(10);
    while got.len() < expected {
        let left = deadline.saturating_duration_since(std::time::Instant::now());
        match bodies.recv_timeout(left) {
            Ok(body) => got.push(body),
            Err(_) => return got,
        }
    }
    got.extend(std::iter::from_fn(|| {
        bodies.recv_timeout(Duration::from_millis(200)).ok()
    }));
    got
}

fn webhook(url: &str, retries: u32) -> WebhookSink {
    WebhookSink {
        url: url.parse().unwrap(),
        timeout: Duration::from_millis(300),
        retries,
        backoff: Duration::from_millis(20),
        ca_file: None,
    }
}

/// One POST through a client made as the dispatcher makes it.
fn post_once(
    url: &str,
    body: &str,
    timeout: Duration,
    ca_file: Option<&Path>,
) -> Result<(), SinkError> {
    WebhookClient::new(&WebhookSink {
        timeout,
        ca_file: ca_file.map(Path::to_path_buf),
        ..webhook(url, 0)
    })?
    .post_once(body)
}

fn deliver_via_webhook(sink: WebhookSink, e: &AlertEvent) {
    let d = AlertDispatcher::start(&AlertSettings {
        webhook: Some(sink),
        ..AlertSettings::default()
    })
    .unwrap();
    d.send(e);
    d.close();
}

#[test]
fn webhook_posts_the_alert_as_json() {
    let (url, bodies) = server(1, Duration::ZERO, |_| Some(204));
    let e = event(HOSTILE);
    post_once(
        &url,
        &serde_json::to_string(&e).unwrap(),
        Duration::from_secs(2),
        None,
    )
    .unwrap();
    let got: serde_json::Value =
        serde_json::from_str(&bodies.recv_timeout(Duration::from_secs(5)).unwrap()).unwrap();
    assert_eq!(got["condition"], "drift:background_level");
    assert_eq!(got["state"], "opened");
    assert_eq!(got["file"], HOSTILE);
}

#[test]
fn an_erroring_webhook_is_retried_until_it_answers() {
    // 500, 503, then 200: three attempts, the third succeeds.
    let (url, bodies) = server(3, Duration::ZERO, |n| Some([500, 503, 200][n]));
    deliver_via_webhook(webhook(&url, 3), &event("a.tif"));
    let received = bodies_received(&bodies, 3);
    assert_eq!(received.len(), 3, "{received:?}");
    assert!(
        received.iter().all(|b| b == &received[0]),
        "same body each time"
    );
}

#[test]
fn an_erroring_webhook_gives_up_after_its_retries() {
    let (url, bodies) = server(10, Duration::ZERO, |_| Some(500));
    deliver_via_webhook(webhook(&url, 2), &event("a.tif"));
    assert_eq!(
        bodies_received(&bodies, 3).len(),
        3,
        "one attempt and two retries"
    );
    let err = post_once(&url, "{}", Duration::from_secs(2), None).unwrap_err();
    assert!(
        matches!(err, SinkError::WebhookStatus { status: 500, .. }),
        "{err:?}"
    );
}

#[test]
fn a_slow_webhook_times_out_and_is_retried() {
    // The first connection gets no answer (held beyond the 300 ms timeout);
    // the retry is answered.
    let (url, bodies) = server(2, Duration::from_secs(2), |n| (n == 1).then_some(200));
    deliver_via_webhook(webhook(&url, 1), &event("a.tif"));
    assert_eq!(bodies_received(&bodies, 2).len(), 2);
}

#[test]
fn a_down_webhook_fails_cleanly() {
    // Nobody listens on 127.0.0.2:P. Holding 127.0.0.1:P for the whole test keeps
    // the port from being handed to another test's server (tests run in parallel
    // and bind 127.0.0.1:0), and Linux refuses a wildcard bind on a port that has
    // a listener, so no one can answer at 127.0.0.2:P either.
    let held = TcpListener::bind("127.0.0.1:0").unwrap();
    let port = held.local_addr().unwrap().port();
    let url = format!("http://127.0.0.2:{port}/x");
    let err = post_once(&url, "{}", Duration::from_millis(300), None).unwrap_err();
    let message = err.to_string();
    match err {
        SinkError::WebhookConnect { address, source } => {
            assert_eq!(address, format!("127.0.0.2:{port}"));
            assert_eq!(source.kind(), std::io::ErrorKind::ConnectionRefused);
            assert!(
                message.starts_with(&format!("webhook: connect 127.0.0.2:{port}: ")),
                "{message}"
            );
        }
        other => panic!("{other:?}"),
    }
    // The dispatcher logs and moves on: close() returns after the bounded retries.
    deliver_via_webhook(webhook(&url, 1), &event("a.tif"));
    drop(held);
}

#[test]
fn sending_never_waits_for_a_stuck_webhook() {
    // The server takes the first request and then holds the connection
    // until the test says so. Sending more events must not wait for it:
    // every send below returns while the server still holds the first one.
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let url = format!("http://{}/x", listener.local_addr().unwrap());
    let (release_tx, release_rx) = mpsc::channel::<()>();
    let (accepted_tx, accepted_rx) = mpsc::channel::<()>();
    let server = std::thread::spawn(move || {
        let (stream, _) = listener.accept().unwrap();
        accepted_tx.send(()).unwrap();
        let _ = release_rx.recv_timeout(Duration::from_secs(10));
        drop(stream);
        // Later connections (the other events) are accepted and dropped.
        listener.set_nonblocking(true).unwrap();
        while listener.accept().is_ok() {}
    });
    let d = AlertDispatcher::start(&AlertSettings {
        webhook: Some(WebhookSink {
            url: url.parse().unwrap(),
            timeout: Duration::from_secs(5),
            retries: 0,
            backoff: Duration::ZERO,
            ca_file: None,
        }),
        ..AlertSettings::default()
    })
    .unwrap();
    d.send(&event("first.tif"));
    accepted_rx.recv_timeout(Duration::from_secs(5)).unwrap();
    for i in 0..50 {
        d.send(&event(&format!("more-{i}.tif")));
    }
    // Reaching this line proves the sends did not wait; the server is still held.
    assert!(!server.is_finished());
    release_tx.send(()).unwrap();
    server.join().unwrap();
    drop(d); // threads finish on their own; short timeouts bound them
}

/// A real program with a hostile name of its own, that writes its stdin and
/// its environment to files, with no shell between framewarden and it.
fn capture_script(dir: &Path) -> std::path::PathBuf {
    let script = dir.join("page the lab; $(touch PWNED4).sh");
    std::fs::write(
        &script,
        "#!/bin/sh\ncat > \"$1/stdin.json\"\nprintf '%s' \"$FRAMEWARDEN_ALERT_FILE\" > \"$1/file.txt\"\nprintf '%s' \"$FRAMEWARDEN_ALERT_STATE\" > \"$1/state.txt\"\nprintf '%s' \"$FRAMEWARDEN_ALERT_POSITIONS\" > \"$1/positions.txt\"\n",
    )
    .unwrap();
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    script
}

#[cfg(unix)]
#[test]
fn the_command_gets_hostile_names_verbatim_and_runs_nothing_else() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out dir $(x)");
    std::fs::create_dir(&out).unwrap();
    let script = capture_script(dir.path());
    let d = AlertDispatcher::start(&AlertSettings {
        command: Some(CommandSink {
            program: script.to_string_lossy().into_owned(),
            args: vec![out.to_string_lossy().into_owned()],
            timeout: Duration::from_secs(10),
        }),
        ..AlertSettings::default()
    })
    .unwrap();
    let e = event(HOSTILE);
    d.send(&e);
    d.close();
    let text = std::fs::read_to_string(out.join("stdin.json")).unwrap();
    let stdin: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert_eq!(stdin["file"], HOSTILE);
    assert_eq!(stdin["message"], e.message);
    assert_eq!(stdin["at_ms"], e.at_ms);
    assert_eq!(
        std::fs::read_to_string(out.join("file.txt")).unwrap(),
        HOSTILE
    );
    assert_eq!(
        std::fs::read_to_string(out.join("state.txt")).unwrap(),
        "opened"
    );
    assert_eq!(
        std::fs::read_to_string(out.join("positions.txt")).unwrap(),
        format!("A01, {HOSTILE_POSITION}")
    );
    assert_eq!(stdin["positions"][1], HOSTILE_POSITION);
    assert_eq!(stdin["evidence"]["position"], "A01");
    for marker in ["PWNED", "PWNED2", "PWNED3", "PWNED4", "PWNED5", "PWNED6"] {
        for place in [dir.path(), out.as_path(), Path::new(".")] {
            assert!(
                !place.join(marker).exists(),
                "{marker} was created in {place:?}"
            );
        }
    }
}

#[cfg(unix)]
#[test]
fn a_hanging_command_is_killed_at_its_timeout() {
    let dir = tempfile::tempdir().unwrap();
    let marker = dir.path().join("finished");
    let d = AlertDispatcher::start(&AlertSettings {
        command: Some(CommandSink {
            program: "/bin/sh".into(),
            args: vec![
                "-c".into(),
                "sleep 30; touch \"$0\"".into(),
                marker.to_string_lossy().into_owned(),
            ],
            timeout: Duration::from_secs(1),
        }),
        ..AlertSettings::default()
    })
    .unwrap();
    d.send(&event("a.tif"));
    d.close(); // returns once the child is killed
    assert!(!marker.exists());
}

#[cfg(target_os = "linux")]
#[test]
fn a_hanging_command_is_killed_at_its_timeout_with_its_children() {
    // The command starts two children of its own (a background job and a
    // pipeline) and waits; at the timeout the whole group ends, not just the
    // shell (procfs says which processes still run).
    let dir = tempfile::tempdir().unwrap();
    let pids = dir.path().join("pids");
    let d = AlertDispatcher::start(&AlertSettings {
        command: Some(CommandSink {
            program: "/bin/sh".into(),
            args: vec![
                "-c".into(),
                "sleep 60 & echo $! >> \"$0\"; sleep 61 | cat & echo $! >> \"$0\"; wait".into(),
                pids.to_string_lossy().into_owned(),
            ],
            timeout: Duration::from_secs(1),
        }),
        ..AlertSettings::default()
    })
    .unwrap();
    d.send(&event("a.tif"));
    d.close();
    let children: Vec<u32> = std::fs::read_to_string(&pids)
        .unwrap()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect();
    assert_eq!(children.len(), 2);
    // A killed process leaves the table as soon as it is collected; allow that.
    wait_for(
        "the command's children to end",
        Duration::from_secs(5),
        || !children.iter().any(|&p| process_runs(p)),
    );
}

/// The PIDs a file holds, one a line.
#[cfg(target_os = "linux")]
fn pids_in(path: &Path) -> Vec<u32> {
    std::fs::read_to_string(path)
        .unwrap_or_default()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect()
}

/// The alert deliveries the service recorded: (sink, finished, error).
#[cfg(target_os = "linux")]
fn deliveries(db: &Path) -> Vec<(String, bool, Option<String>)> {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    conn.busy_timeout(Duration::from_secs(10)).unwrap();
    let mut stmt = conn
        .prepare("SELECT sink, finished_at_ms IS NOT NULL, error FROM alert_deliveries ORDER BY id")
        .unwrap();
    let rows = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    rows
}

#[cfg(target_os = "linux")]
#[test]
fn sigterm_with_a_stuck_command_ends_it_and_its_children_and_the_next_start_delivers() {
    // The real binary with a command sink that hangs (a child `sleep 600`
    // and a wait) until a file says it may answer; a limit on free space no
    // disk meets raises alerts at once. SIGTERM must not wait for the 600 s
    // command timeout (the shutdown bound is 60 s): the command's group is
    // killed, and the deliveries not made stay in the database, to be made
    // by the next start once the command answers.
    let sink_dir = tempfile::tempdir().unwrap();
    let script = sink_dir.path().join("sink.sh");
    std::fs::write(
        &script,
        "#!/bin/sh\nif [ -e \"$1/answer\" ]; then cat >> \"$1/events.jsonl\"; exit 0; fi\n\
         sleep 600 &\necho $! >> \"$1/children\"\nwait\n",
    )
    .unwrap();
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755)).unwrap();
    }
    let mut bench = Bench::new(&format!(
        "shutdown_timeout_s = 60\n[quality]\nmin_free_space_mib = 1000000000\n\
         [alerts]\ncommand = [\"{}\", \"{}\"]\ncommand_timeout_s = 600\n",
        script.display(),
        sink_dir.path().display()
    ));
    bench.start();
    let children = sink_dir.path().join("children");
    wait_for("the command to hang", Duration::from_secs(30), || {
        !pids_in(&children).is_empty()
    });
    bench.signal("TERM");
    assert_eq!(
        bench.wait_exit(Duration::from_secs(30)),
        Some(0),
        "{}",
        bench.logs()
    );
    wait_for("the command's child to end", Duration::from_secs(5), || {
        !pids_in(&children).into_iter().any(process_runs)
    });
    let left = deliveries(&bench.db);
    assert!(!left.is_empty());
    assert!(
        left.iter()
            .all(|(sink, finished, _)| sink == "command" && !finished),
        "{left:?}"
    );
    // The command answers now; the next start makes every delivery left.
    std::fs::write(sink_dir.path().join("answer"), "").unwrap();
    bench.start();
    let events = sink_dir.path().join("events.jsonl");
    wait_for(
        "the deliveries left to be made",
        Duration::from_secs(30),
        || {
            deliveries(&bench.db)
                .iter()
                .take(left.len())
                .all(|(_, finished, _)| *finished)
        },
    );
    bench.signal("TERM");
    assert_eq!(bench.wait_exit(Duration::from_secs(30)), Some(0));
    let made = deliveries(&bench.db);
    assert!(made.iter().all(|(_, _, error)| error.is_none()), "{made:?}");
    let received: Vec<serde_json::Value> = std::fs::read_to_string(&events)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert!(received.len() >= left.len(), "{received:?}");
    assert!(
        received.iter().all(|e| e["condition"]
            .as_str()
            .unwrap()
            .starts_with("low_disk_space:")),
        "{received:?}"
    );
    assert!(bench
        .logs()
        .contains("alert deliveries not made before the last stop are sent now"));
}

#[test]
fn the_file_sink_appends_one_json_line_per_event() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("alerts.jsonl");
    std::fs::write(&path, "{\"earlier\":true}\n").unwrap();
    let d = AlertDispatcher::start(&AlertSettings {
        file: Some(path.clone()),
        ..AlertSettings::default()
    })
    .unwrap();
    let opened = event(HOSTILE);
    let recovered = AlertEvent {
        state: AlertState::Recovered,
        message: "back in control".into(),
        ..opened.clone()
    };
    d.send(&opened);
    d.send(&recovered);
    d.close();
    let text = std::fs::read_to_string(&path).unwrap();
    let lines: Vec<serde_json::Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 3, "{text}");
    assert_eq!(lines[0]["earlier"], true, "earlier content kept");
    assert_eq!(lines[1]["state"], "opened");
    assert_eq!(lines[1]["file"], HOSTILE);
    assert_eq!(lines[2]["state"], "recovered");
}

/// A TLS server on 127.0.0.1 with a fresh self-signed certificate for
/// "localhost" (rcgen), answering one connection with 200 through the same
/// request handler as the plain server. Returns the URL, the CA file to trust,
/// the bodies channel, and the folder holding the CA file.
fn tls_server(
    answer: bool,
) -> (
    String,
    std::path::PathBuf,
    mpsc::Receiver<String>,
    tempfile::TempDir,
) {
    use rustls::pki_types::{PrivateKeyDer, PrivatePkcs8KeyDer};
    let rcgen::CertifiedKey { cert, signing_key } =
        rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let ca = dir.path().join("in-house-ca.pem");
    std::fs::write(&ca, cert.pem()).unwrap();
    let key = PrivateKeyDer::Pkcs8(PrivatePkcs8KeyDer::from(signing_key.serialize_der()));
    let config = rustls::ServerConfig::builder_with_provider(std::sync::Arc::new(
        rustls::crypto::ring::default_provider(),
    ))
    .with_safe_default_protocol_versions()
    .unwrap()
    .with_no_client_auth()
    .with_single_cert(vec![cert.der().clone()], key)
    .unwrap();
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let url = format!(
        "https://localhost:{}/hooks/night",
        listener.local_addr().unwrap().port()
    );
    let (body_tx, body_rx) = mpsc::channel();
    std::thread::spawn(move || {
        let Ok((tcp, _)) = listener.accept() else {
            return;
        };
        tcp.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
        let conn = rustls::ServerConnection::new(std::sync::Arc::new(config)).unwrap();
        let mut tls = rustls::StreamOwned::new(conn, tcp);
        if answer {
            handle(tls, Some(200), Duration::ZERO, &body_tx);
        } else {
            // The client refuses the handshake: nothing to read.
            let _ = tls.read(&mut [0u8; 1]);
        }
    });
    (url, ca, body_rx, dir)
}

#[test]
fn an_https_webhook_is_posted_through_tls_trusting_the_configured_ca() {
    let (url, ca, bodies, _dir) = tls_server(true);
    let e = event(HOSTILE);
    post_once(
        &url,
        &serde_json::to_string(&e).unwrap(),
        Duration::from_secs(5),
        Some(&ca),
    )
    .unwrap();
    let got: serde_json::Value =
        serde_json::from_str(&bodies.recv_timeout(Duration::from_secs(5)).unwrap()).unwrap();
    assert_eq!(got["file"], HOSTILE);
}

#[test]
fn an_https_webhook_with_an_untrusted_certificate_is_refused() {
    // Same server, but the client trusts only the bundled public roots.
    let (url, _ca, bodies, _dir) = tls_server(false);
    let err = post_once(&url, "{}", Duration::from_secs(5), None).unwrap_err();
    assert!(matches!(err, SinkError::WebhookTls { .. }), "{err:?}");
    assert!(err.to_string().contains("certificate"), "{err}");
    assert!(
        bodies.recv_timeout(Duration::from_millis(200)).is_err(),
        "nothing was delivered"
    );
}

#[test]
fn a_status_other_than_2xx_is_an_error_naming_it() {
    // 201 succeeds; a redirect is not followed, and like any other non-2xx
    // answer it fails with its number.
    let statuses = [201, 302, 404, 503];
    let (url, bodies) = server(statuses.len(), Duration::ZERO, move |n| Some(statuses[n]));
    let port = url.split(':').nth(2).unwrap().split('/').next().unwrap();
    assert!(post_once(&url, "{}", Duration::from_secs(2), None).is_ok());
    for status in &statuses[1..] {
        let err = post_once(&url, "{}", Duration::from_secs(2), None).unwrap_err();
        assert!(
            matches!(err, SinkError::WebhookStatus { status: s, .. } if s == *status),
            "{err:?}"
        );
        assert_eq!(
            err.to_string(),
            format!("webhook 127.0.0.1:{port}: HTTP status {status}")
        );
    }
    assert_eq!(
        bodies_received(&bodies, statuses.len()).len(),
        statuses.len()
    );
}

#[test]
fn a_webhook_that_never_answers_times_out_at_its_timeout() {
    // The server reads the request and then says nothing for 3 s; the client
    // gives up after its 300 ms.
    let (url, _bodies) = server(1, Duration::from_secs(3), |_| None);
    let started = std::time::Instant::now();
    let err = post_once(&url, "{}", Duration::from_millis(300), None).unwrap_err();
    let waited = started.elapsed();
    assert!(
        matches!(
            err,
            SinkError::WebhookTimeout {
                waiting_for: "answer",
                ..
            }
        ),
        "{err:?}"
    );
    assert!(
        err.to_string().ends_with("no answer within 300 ms"),
        "{err}"
    );
    assert!(
        waited >= Duration::from_millis(250) && waited < Duration::from_secs(2),
        "{waited:?}"
    );
}

#[test]
fn the_post_says_json_and_names_framewarden() {
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let url = format!("http://{}/hooks/night", listener.local_addr().unwrap());
    let server = std::thread::spawn(move || {
        let (mut stream, _) = listener.accept().unwrap();
        stream
            .set_read_timeout(Some(Duration::from_secs(5)))
            .unwrap();
        let mut head = Vec::new();
        let mut reader = BufReader::new(&mut stream);
        loop {
            let mut line = String::new();
            if reader.read_line(&mut line).unwrap() == 0 || line == "\r\n" {
                break;
            }
            head.push(line.trim_end().to_ascii_lowercase());
        }
        let _ =
            stream.write_all(b"HTTP/1.1 200 OK\r\nContent-Length: 0\r\nConnection: close\r\n\r\n");
        head
    });
    post_once(&url, "{\"a\":1}", Duration::from_secs(2), None).unwrap();
    let head = server.join().unwrap();
    assert_eq!(head[0], "post /hooks/night http/1.1");
    for expected in [
        "content-type: application/json".to_string(),
        format!("user-agent: framewarden/{}", env!("CARGO_PKG_VERSION")),
        "content-length: 7".to_string(),
    ] {
        assert!(head.contains(&expected), "{expected} not in {head:?}");
    }
}

/// The `[alerts]` section alone, as a configuration file in `dir`.
fn load_alerts(dir: &Path, alerts: &str) -> Result<AlertSettings, String> {
    let path = dir.join("framewarden.toml");
    framewarden::settings::from_text(&format!("[alerts]\n{alerts}\n"), &path)
        .map(|s| s.alerts)
        .map_err(|e| e.to_string())
}

#[test]
fn a_webhook_url_that_cannot_be_posted_to_stops_the_configuration_loading() {
    let dir = tempfile::tempdir().unwrap();
    for (url, reason) in [
        ("ftp://127.0.0.1/hook", "scheme ftp: only http and https"),
        ("127.0.0.1:8080/hook", "not a URL"),
        ("http:///hook", "not a URL"),
        ("http://:8080/hook", "no host"),
        (
            "http://127.0.0.1:65536/hook",
            "port \"65536\": expected 1 to 65535",
        ),
        ("http://127.0.0.1:0/hook", "port \"0\""),
        ("https://localhost:https/hook", "port \"https\""),
    ] {
        let err = load_alerts(dir.path(), &format!("webhook_url = \"{url}\"")).unwrap_err();
        assert!(err.contains("alerts.webhook_url = "), "{url}: {err}");
        assert!(err.contains(reason), "{url}: {err}");
    }
    let a = load_alerts(dir.path(), "webhook_url = \"http://127.0.0.1:8080/hook\"").unwrap();
    assert_eq!(a.webhook.unwrap().url.address(), "127.0.0.1:8080");
}

#[test]
fn a_ca_file_without_a_usable_certificate_stops_the_configuration_loading() {
    let dir = tempfile::tempdir().unwrap();
    let key_only = rcgen::KeyPair::generate().unwrap().serialize_pem();
    for (name, content, reason) in [
        ("missing.pem", None, "No such file"),
        ("empty.pem", Some(String::new()), "holds no certificate"),
        ("key.pem", Some(key_only), "holds no certificate"),
        (
            "broken.pem",
            Some("-----BEGIN CERTIFICATE-----\n%%%\n-----END CERTIFICATE-----\n".to_string()),
            "not PEM",
        ),
        (
            "not-der.pem",
            Some("-----BEGIN CERTIFICATE-----\nAAAA\n-----END CERTIFICATE-----\n".to_string()),
            "certificate 1",
        ),
    ] {
        if let Some(content) = content {
            std::fs::write(dir.path().join(name), content).unwrap();
        }
        let err = load_alerts(
            dir.path(),
            &format!("webhook_url = \"https://localhost:8443/x\"\nwebhook_ca_file = \"{name}\""),
        )
        .unwrap_err();
        let path = dir.path().join(name);
        assert!(
            err.contains(&format!("alerts.webhook_ca_file = {}: ", path.display())),
            "{name}: {err}"
        );
        assert!(err.contains(reason), "{name}: {err}");
    }
}

#[test]
fn an_https_webhook_from_the_configuration_reaches_the_in_house_server() {
    // Loaded as a user writes it: the CA file relative to the configuration.
    let (url, ca, bodies, dir) = tls_server(true);
    let a = load_alerts(
        dir.path(),
        &format!(
            "webhook_url = \"{url}\"\nwebhook_ca_file = \"in-house-ca.pem\"\nwebhook_retries = 0"
        ),
    )
    .unwrap();
    let sink = a.webhook.clone().unwrap();
    assert_eq!(sink.ca_file.as_deref(), Some(ca.as_path()));
    let d = AlertDispatcher::start(&a).unwrap();
    d.send(&event(HOSTILE));
    d.close();
    let got: serde_json::Value =
        serde_json::from_str(&bodies.recv_timeout(Duration::from_secs(5)).unwrap()).unwrap();
    assert_eq!(got["file"], HOSTILE);
}

/// A server that reads one request, then sends its answer one byte every
/// `every`, headers and all; it stops when the client goes away.
fn trickling_server(every: Duration, headers_at_once: bool) -> String {
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let url = format!("http://{}/hooks/night", listener.local_addr().unwrap());
    std::thread::spawn(move || {
        let Ok((mut stream, _)) = listener.accept() else {
            return;
        };
        stream
            .set_read_timeout(Some(Duration::from_secs(5)))
            .unwrap();
        let mut request = [0u8; 4096];
        let _ = stream.read(&mut request);
        let answer = format!(
            "HTTP/1.1 200 OK\r\nContent-Length: 40\r\nConnection: close\r\n\r\n{}",
            "x".repeat(40)
        );
        let (head, rest) = if headers_at_once {
            answer.split_at(answer.find("\r\n\r\n").unwrap() + 4)
        } else {
            ("", answer.as_str())
        };
        if stream.write_all(head.as_bytes()).is_err() {
            return;
        }
        for byte in rest.as_bytes() {
            if stream.write_all(&[*byte]).is_err() {
                return;
            }
            std::thread::sleep(every);
        }
    });
    url
}

#[test]
fn a_webhook_that_trickles_its_answer_is_cut_at_the_timeout() {
    // The answer at one byte per 150 ms would take 15 s. Each read gets a
    // byte well within the 600 ms timeout, yet the attempt as a whole is
    // bounded by it: trickled headers end in a timeout; once the status line
    // and headers are in, the attempt is over and the body is not waited for.
    for headers_at_once in [false, true] {
        let url = trickling_server(Duration::from_millis(150), headers_at_once);
        let started = std::time::Instant::now();
        let result = post_once(&url, "{}", Duration::from_millis(600), None);
        let waited = started.elapsed();
        if headers_at_once {
            assert!(result.is_ok(), "{result:?}");
        } else {
            assert!(
                matches!(
                    result,
                    Err(SinkError::WebhookTimeout {
                        waiting_for: "answer",
                        ..
                    })
                ),
                "{result:?}"
            );
        }
        assert!(waited < Duration::from_secs(3), "{waited:?}");
    }
}
