//! A real server on 127.0.0.1 with an OS-chosen port, its own bundle
//! directory and audit database in a temporary directory, stopped through a
//! oneshot like a signal would.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use plumbline::audit::AuditReader;
use plumbline::pb::scoring_client::ScoringClient;
use plumbline::service::{self, Loader, Settings, StartError};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tonic::transport::Channel;

pub struct TestServer {
    pub addr: SocketAddr,
    /// Where the metrics endpoint listens, when `metrics.listen` was set
    /// (port 0 there becomes the OS-chosen port here).
    pub metrics_addr: Option<SocketAddr>,
    pub dir: tempfile::TempDir,
    pub bundles: PathBuf,
    pub audit_path: PathBuf,
    pub settings: Settings,
    stop: Option<oneshot::Sender<()>>,
    task: Option<JoinHandle<Result<(), StartError>>>,
}

/// Settings for tests: everything in `dir`, fast polling.
pub fn test_settings(dir: &Path) -> Settings {
    let mut s = Settings::default();
    s.models.dir = dir.join("bundles");
    s.models.reload_poll_ms = 50;
    s.audit.path = dir.join("audit.db");
    s.server.workers = 2;
    s.server.shutdown_grace_ms = 5_000;
    s
}

impl TestServer {
    /// Starts a server after `populate` filled the bundle directory.
    pub async fn start(
        loader: Loader,
        populate: impl FnOnce(&Path),
        tweak: impl FnOnce(&mut Settings),
    ) -> TestServer {
        let dir = tempfile::tempdir().expect("temporary directory");
        let mut settings = test_settings(dir.path());
        std::fs::create_dir_all(&settings.models.dir).expect("bundle directory");
        populate(&settings.models.dir);
        tweak(&mut settings);
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind loopback");
        let addr = listener.local_addr().expect("local address");
        let metrics_listener = match settings.metrics.listen_addr().expect("metrics address") {
            Some(a) => Some(
                tokio::net::TcpListener::bind(a)
                    .await
                    .expect("bind metrics"),
            ),
            None => None,
        };
        let metrics_addr = metrics_listener
            .as_ref()
            .map(|l| l.local_addr().expect("metrics address"));
        let (stop, stopped) = oneshot::channel::<()>();
        let task = tokio::spawn(service::run_with_listeners(
            settings.clone(),
            loader,
            listener,
            metrics_listener,
            async move {
                let _ = stopped.await;
            },
        ));
        TestServer {
            addr,
            metrics_addr,
            bundles: settings.models.dir.clone(),
            audit_path: settings.audit.path.clone(),
            settings,
            dir,
            stop: Some(stop),
            task: Some(task),
        }
    }

    pub fn endpoint(&self) -> String {
        format!("http://{}", self.addr)
    }

    pub async fn channel(&self) -> Channel {
        // The server may still be loading bundles: retry briefly.
        let mut last = None;
        for _ in 0..100 {
            match Channel::from_shared(self.endpoint())
                .expect("endpoint")
                .connect()
                .await
            {
                Ok(c) => return c,
                Err(e) => last = Some(e),
            }
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        }
        panic!("server at {} did not come up: {last:?}", self.addr);
    }

    pub async fn client(&self) -> ScoringClient<Channel> {
        ScoringClient::new(self.channel().await)
            .max_decoding_message_size(256 << 20)
            .max_encoding_message_size(256 << 20)
    }

    pub fn reader(&self) -> AuditReader {
        AuditReader::open(&self.audit_path).expect("open the audit database")
    }

    /// Signals shutdown and waits for `run` to return.
    pub async fn stop(mut self) -> Result<(), StartError> {
        self.stop_in_place().await
    }

    pub async fn stop_in_place(&mut self) -> Result<(), StartError> {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        match self.task.take() {
            Some(t) => t.await.expect("server task"),
            None => Ok(()),
        }
    }

    /// The server task's result if it already ended (start-up failures).
    pub async fn outcome(mut self) -> Result<(), StartError> {
        match self.task.take() {
            Some(t) => t.await.expect("server task"),
            None => Ok(()),
        }
    }
}

impl Drop for TestServer {
    fn drop(&mut self) {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
    }
}
