//! The server child process of the service benchmarks: serves the bundles
//! under `dir/bundles` on an OS-chosen loopback port, prints `PORT <n>` on
//! stdout for the parent, and stops cleanly when its stdin closes.

use std::io::Write;
use std::path::Path;

use ndarray::{Array1, Array2};
use plumbline::data::Table;
use plumbline::service::Settings;

/// A training table for a benchmark bundle: rows `t0…`, descriptors
/// `d0…`, and a content hash made from `seed` so each seed is a new version.
#[allow(dead_code)] // the comparison bench brings its own tables
pub fn training_table(x: Array2<f64>, y: Array1<f64>, seed: u64) -> Table {
    Table {
        ids: (0..x.nrows()).map(|i| format!("t{i}")).collect(),
        descriptor_names: (0..x.ncols()).map(|j| format!("d{j}")).collect(),
        x,
        y: Some(y),
        groups: None,
        times: None,
        dropped_constant: Vec::new(),
        dropped_incomplete: 0,
        sha256: format!("{seed:064x}"),
    }
}

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
