//! The `watch` command as a process: a small async runtime for signals, systemd
//! readiness and the watchdog around the [`Service`].
//!
//! The service itself (threads, queue, store) knows nothing of signals or
//! systemd; this file decides when it stops and tells systemd how it is doing.

use std::future::Future;

use crate::daemon::service::{Service, WatchError, WatchOptions, WatchSummary};
use crate::settings::Settings;

/// Installs SIGINT (Ctrl-C) and SIGTERM (systemd's stop) handlers now, and
/// returns a future that completes on the first of them. Installing before the
/// service starts leaves no window in which a signal would kill the process
/// without a clean stop. Must be called inside a tokio runtime.
///
/// # Errors
/// When a handler cannot be installed.
#[cfg(unix)]
pub fn stop_signal() -> std::io::Result<impl Future<Output = ()>> {
    use tokio::signal::unix::{signal, SignalKind};
    let mut interrupt = signal(SignalKind::interrupt())?;
    let mut terminate = signal(SignalKind::terminate())?;
    Ok(async move {
        tokio::select! {
            _ = interrupt.recv() => tracing::info!("interrupted (SIGINT)"),
            _ = terminate.recv() => tracing::info!("terminated (SIGTERM)"),
        }
    })
}

/// On Windows: Ctrl-C or Ctrl-Break in the console, the console window being
/// closed, or the system shutting down (Windows then allows a few seconds).
///
/// # Errors
/// When a handler cannot be installed.
#[cfg(windows)]
pub fn stop_signal() -> std::io::Result<impl Future<Output = ()>> {
    use tokio::signal::windows::{ctrl_break, ctrl_c, ctrl_close, ctrl_shutdown};
    let mut interrupt = ctrl_c()?;
    let mut brk = ctrl_break()?;
    let mut close = ctrl_close()?;
    let mut shutdown = ctrl_shutdown()?;
    Ok(async move {
        tokio::select! {
            _ = interrupt.recv() => tracing::info!("interrupted (Ctrl-C)"),
            _ = brk.recv() => tracing::info!("interrupted (Ctrl-Break)"),
            _ = close.recv() => tracing::info!("console closed"),
            _ = shutdown.recv() => tracing::info!("system shutting down"),
        }
    })
}

/// Runs `watch` until SIGINT/SIGTERM: builds the runtime, starts the service,
/// tells systemd it is ready, feeds the watchdog while the pipeline makes
/// progress, and stops within the configured bound.
///
/// # Errors
/// Start-up failures ([`WatchError`]).
pub fn watch_until_signal(
    settings: &Settings,
    options: &WatchOptions,
) -> Result<WatchSummary, WatchError> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|source| WatchError::Start {
            what: "the async runtime".into(),
            source,
        })?;
    let shutdown = {
        let _context = runtime.enter();
        stop_signal().map_err(|source| WatchError::Start {
            what: "the signal handlers".into(),
            source,
        })?
    };
    let result = runtime.block_on(watch_with_systemd(settings, options, shutdown));
    // A stop that overran its bound is still running on the blocking pool;
    // dropping the runtime would wait for it forever. Leave it: the process is
    // about to exit, and whatever it held stays queued for the next start.
    runtime.shutdown_background();
    result
}

async fn watch_with_systemd(
    settings: &Settings,
    options: &WatchOptions,
    shutdown: impl Future<Output = ()>,
) -> Result<WatchSummary, WatchError> {
    let service = Service::start(settings, options)?;
    tell_systemd(Note::Ready);
    let progress = service.progress();
    let watchdog = async move {
        // Without a watchdog configured, this arm never completes.
        let Some(interval) = watchdog_interval() else {
            return std::future::pending::<()>().await;
        };
        let mut last_finished = u64::MAX;
        let repeats = crate::text::Repeats::default();
        loop {
            tokio::time::sleep(interval / 2).await;
            let finished = progress.finished.load(std::sync::atomic::Ordering::Relaxed);
            // Fed only while the pipeline moves: idle (nothing outstanding) or
            // at least one frame finished since the last feed. A stuck worker
            // or writer starves it and systemd restarts the service.
            if progress.outstanding() == 0 || finished != last_finished {
                tell_systemd(Note::Watchdog);
                last_finished = finished;
            } else {
                repeats.warn(
                    "watchdog starved",
                    format_args!(
                        "no frame finished for {} ms with work outstanding",
                        (interval / 2).as_millis()
                    ),
                );
            }
        }
    };
    let trouble = async {
        loop {
            tokio::time::sleep(THREAD_CHECK).await;
            if let Some(trouble) = service.trouble() {
                return trouble;
            }
        }
    };
    let mut failed = None;
    tokio::select! {
        () = shutdown => {}
        () = watchdog => {}
        e = trouble => {
            tracing::error!("stopping the service: {e}");
            failed = Some(e);
        }
    }
    tell_systemd(Note::Stopping);
    tracing::info!("stopping: finishing frames in hand");
    let summary = service.stop_within_bound().await;
    tracing::info!(
        "stopped: run {}, {} frames done, {} failed this session{}",
        summary.run_id,
        summary.done,
        summary.failed,
        if summary.clean {
            ""
        } else {
            " (time bound hit)"
        }
    );
    match failed {
        Some(e) => Err(e),
        None => Ok(summary),
    }
}

/// How often the service is checked for a database fault or a thread that ended.
const THREAD_CHECK: std::time::Duration = std::time::Duration::from_secs(1);

/// What the service tells systemd.
#[derive(Debug, Clone, Copy)]
enum Note {
    Ready,
    Watchdog,
    Stopping,
}

#[cfg(unix)]
fn tell_systemd(note: Note) {
    let state = match note {
        Note::Ready => sd_notify::NotifyState::Ready,
        Note::Watchdog => sd_notify::NotifyState::Watchdog,
        Note::Stopping => sd_notify::NotifyState::Stopping,
    };
    // Outside systemd NOTIFY_SOCKET is unset and this is a no-op.
    if let Err(e) = sd_notify::notify(&[state]) {
        tracing::debug!("systemd notify failed: {e}");
    }
}

/// No systemd here: nothing to tell.
#[cfg(not(unix))]
fn tell_systemd(_note: Note) {}

/// The watchdog interval systemd asks for (`WATCHDOG_USEC`), if any.
#[cfg(unix)]
fn watchdog_interval() -> Option<std::time::Duration> {
    sd_notify::watchdog_enabled()
}

#[cfg(not(unix))]
fn watchdog_interval() -> Option<std::time::Duration> {
    None
}
