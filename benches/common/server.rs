//! The server child process of the service benchmarks: serves the bundles
//! under `dir/bundles` on an OS-chosen loopback port, prints `PORT <n>` on
//! stdout for the parent, and stops cleanly when its stdin closes.

use std::io::Write;
use std::path::Path;

use plumbline::service::Settings;

/// Runs the server child; `adjust` sets what the benchmark needs on top of
/// the `PLUMBLINE_*` environment (e.g. PLUMBLINE_AUDIT__SYNCHRONOUS=normal).
pub fn serve_child(dir: &Path, adjust: impl FnOnce(&mut Settings)) {
    let mut settings = Settings::load_from_process_env(None, &[]).expect("settings");
    settings.models.dir = dir.join("bundles");
    settings.audit.path = dir.join("audit.db");
    adjust(&mut settings);
    let rt = plumbline::service::build_runtime(&settings).expect("runtime");
    rt.block_on(async move {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind");
        let port = listener.local_addr().expect("address").port();
        println!("PORT {port}");
        let _ = std::io::stdout().flush();
        let shutdown = async {
            use tokio::io::AsyncReadExt;
            let mut sink = Vec::new();
            let _ = tokio::io::stdin().read_to_end(&mut sink).await;
        };
        plumbline::service::run(settings, listener, shutdown)
            .await
            .expect("serve");
    });
}
