//! Shutdown signals: SIGINT (Ctrl-C) and SIGTERM end the long-running
//! commands cleanly. Commands take the signal as a future argument, so tests
//! can pass their own.

/// Resolves on the first SIGINT or SIGTERM.
pub async fn signalled() {
    let ctrl_c = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = ctrl_c => {}
                    _ = term.recv() => {}
                }
            }
            Err(_) => {
                let _ = ctrl_c.await;
            }
        }
    }
    #[cfg(not(unix))]
    {
        let _ = ctrl_c.await;
    }
}
