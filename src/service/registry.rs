//! The model registry: every `*.plumb` bundle in the models directory,
//! loaded at start and reloaded when the directory changes (polled by file
//! size, modification time and inode) or on SIGHUP.
//!
//! The loaded set is an immutable [`Models`] behind `RwLock<Arc<_>>`: a call
//! clones the `Arc` once and keeps the models it started with however long
//! it runs, while a reload builds a new set and swaps the pointer. The lock
//! is held only to clone or swap, never while loading. A bundle that fails to
//! load never replaces a model that works: the previous version stays.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, RwLock};
use std::time::SystemTime;

use ndarray::ArrayView2;
use tokio::sync::watch;

use crate::scoring::{CandidateScore, ModelInfo, ScoringModel};

/// What the service needs of a fitted model. [`ScoringModel`] is the real
/// one; the trait keeps the registry and the request path testable without
/// bundle files.
pub trait Scorer: Send + Sync + 'static {
    fn info(&self) -> &ModelInfo;
    /// Scores B rows given in the bundle's descriptor order, all finite and
    /// none [`Scorer::unscorable_column`].
    fn score(&self, x_raw: ArrayView2<f64>, confidence: f64) -> Vec<CandidateScore>;
    /// The first descriptor of a finite row (bundle order) the model cannot
    /// take, if any: see [`ScoringModel::unscorable_column`].
    fn unscorable_column(&self, _row: &[f64]) -> Option<usize> {
        None
    }
    /// The fitted pipeline behind the scorer, when there is one: review
    /// needs its standardisation, PCA and neighbour index.
    fn scoring_model(&self) -> Option<&ScoringModel> {
        None
    }
}

impl Scorer for ScoringModel {
    fn info(&self) -> &ModelInfo {
        &self.info
    }
    fn score(&self, x_raw: ArrayView2<f64>, confidence: f64) -> Vec<CandidateScore> {
        ScoringModel::score(self, x_raw, confidence)
    }
    fn unscorable_column(&self, row: &[f64]) -> Option<usize> {
        ScoringModel::unscorable_column(self, row)
    }
    fn scoring_model(&self) -> Option<&ScoringModel> {
        Some(self)
    }
}

/// A claim of the fit: an outer-CV metric as mean and standard error.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ClaimFact {
    pub metric: String,
    pub mean: f64,
    pub se: f64,
}

/// The domain thresholds a bundle was calibrated with.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ThresholdFacts {
    pub k: u32,
    pub components: u32,
    pub explained_variance: f64,
    pub z: f64,
    pub z_threshold: f64,
    pub leverage_warning: f64,
    pub leverage_meaningful: bool,
    pub pca_residual_border_limit: f64,
    pub pca_residual_limit: f64,
    pub typicality_border: f64,
    pub typicality_outside: f64,
}

/// What a bundle's manifest says beside the model itself: the parts of the
/// model card that [`ModelInfo`] does not carry.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct CardFacts {
    pub claims: Vec<ClaimFact>,
    pub thresholds: ThresholdFacts,
    pub training_rows: u64,
    pub training_data_sha256: String,
    pub created_at: String,
    pub cautions: Vec<String>,
    /// Share of training rows judged outside the domain out-of-fold: what
    /// the outside-share alarm expects of new queries. None when unknown.
    pub oof_outside_share: Option<f64>,
    /// Training row ids and observed values, in training-row order, so
    /// review can name a case's nearest training rows and what was measured
    /// for them. Shared, not copied, between model versions' facts.
    pub training_ids: Arc<Vec<String>>,
    pub training_y: Arc<Vec<f64>>,
}

/// One loaded bundle.
pub struct Bundle {
    pub scorer: Arc<dyn Scorer>,
    pub facts: CardFacts,
}

/// Reads one bundle file; the error says what is wrong with it.
pub type Loader = Arc<dyn Fn(&Path) -> Result<Bundle, String> + Send + Sync>;

/// Identity of a file's current content, as far as polling can tell.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct FileStamp {
    len: u64,
    modified: Option<SystemTime>,
    inode: u64,
}

impl FileStamp {
    fn of(meta: &std::fs::Metadata) -> FileStamp {
        #[cfg(unix)]
        let inode = std::os::unix::fs::MetadataExt::ino(meta);
        #[cfg(not(unix))]
        let inode = 0;
        FileStamp {
            len: meta.len(),
            modified: meta.modified().ok(),
            inode,
        }
    }
}

/// A model being served.
pub struct LoadedModel {
    pub scorer: Arc<dyn Scorer>,
    pub facts: CardFacts,
    pub path: PathBuf,
    stamp: FileStamp,
}

impl LoadedModel {
    pub fn info(&self) -> &ModelInfo {
        self.scorer.info()
    }
    pub fn id(&self) -> &str {
        &self.info().id
    }
}

impl std::fmt::Debug for LoadedModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LoadedModel")
            .field("id", &self.id())
            .field("version", &self.info().version)
            .field("path", &self.path)
            .finish()
    }
}

/// Registry errors.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("cannot read the models directory {dir}: {source} (setting `models.dir`)")]
    DirUnreadable {
        dir: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(
        "the models directory {dir} holds no *.plumb bundle; write one with `plumbline fit \
         --out {dir_display}/NAME.plumb` (setting `models.dir`)",
        dir_display = dir.display()
    )]
    NoBundles { dir: PathBuf },
    #[error("no bundle in {dir} could be loaded: {}", list_failures(failures))]
    NoneLoaded {
        dir: PathBuf,
        failures: Vec<(PathBuf, String)>,
    },
    #[error(
        "the default model '{id}' (setting `models.default`) is not among the loaded models \
         [{}] in {dir}", available.join(", ")
    )]
    DefaultMissing {
        id: String,
        dir: PathBuf,
        available: Vec<String>,
    },
    #[error("no model '{requested}' is loaded; loaded models: [{}] (see ListModels)", available.join(", "))]
    UnknownModel {
        requested: String,
        available: Vec<String>,
    },
    #[error("no default model is loaded; name one of [{}] in the request", available.join(", "))]
    NoDefault { available: Vec<String> },
}

fn list_failures(failures: &[(PathBuf, String)]) -> String {
    failures
        .iter()
        .map(|(p, e)| format!("{}: {e}", p.display()))
        .collect::<Vec<_>>()
        .join("; ")
}

/// An immutable set of loaded models.
#[derive(Debug, Default)]
pub struct Models {
    by_id: BTreeMap<String, Arc<LoadedModel>>,
    default_id: Option<String>,
}

impl Models {
    /// The model a request names; empty means the default.
    pub fn get(&self, name: &str) -> Result<Arc<LoadedModel>, Error> {
        let found = if name.is_empty() {
            self.default_id.as_ref().and_then(|id| self.by_id.get(id))
        } else {
            self.by_id.get(name)
        };
        found.cloned().ok_or_else(|| {
            let available = self.ids();
            if name.is_empty() {
                Error::NoDefault { available }
            } else {
                Error::UnknownModel {
                    requested: name.to_string(),
                    available,
                }
            }
        })
    }

    pub fn ids(&self) -> Vec<String> {
        self.by_id.keys().cloned().collect()
    }

    pub fn default_id(&self) -> Option<&str> {
        self.default_id.as_deref()
    }

    pub fn is_empty(&self) -> bool {
        self.by_id.is_empty()
    }

    pub fn len(&self) -> usize {
        self.by_id.len()
    }

    /// Every model, the default first, then by id.
    pub fn default_first(&self) -> Vec<Arc<LoadedModel>> {
        let mut out: Vec<Arc<LoadedModel>> = Vec::with_capacity(self.by_id.len());
        if let Some(d) = self.default_id.as_ref().and_then(|id| self.by_id.get(id)) {
            out.push(d.clone());
        }
        for (id, m) in &self.by_id {
            if Some(id) != self.default_id.as_ref() {
                out.push(m.clone());
            }
        }
        out
    }
}

/// What a rescan did.
#[derive(Debug, Default, PartialEq)]
pub struct ReloadReport {
    /// (model id, version, file) newly loaded.
    pub loaded: Vec<(String, String, PathBuf)>,
    /// Files that failed to load, with the reason; a model previously loaded
    /// from such a file is still served.
    pub failed: Vec<(PathBuf, String)>,
    /// Files no longer present whose models were dropped.
    pub removed: Vec<PathBuf>,
    /// Whether the served set was swapped.
    pub swapped: bool,
}

#[derive(Default)]
struct ScanState {
    /// What each file currently contributes.
    by_path: BTreeMap<PathBuf, Arc<LoadedModel>>,
    /// The stamp last tried per file, so a broken file is retried only when
    /// it changes (or on a forced reload), not on every poll.
    last_tried: BTreeMap<PathBuf, FileStamp>,
}

/// The registry.
pub struct Registry {
    dir: PathBuf,
    default_setting: String,
    loader: Loader,
    current: RwLock<Arc<Models>>,
    scan: Mutex<ScanState>,
    changes: watch::Sender<Arc<Models>>,
}

impl Registry {
    /// Loads every bundle in `dir`. Bundles that fail are logged and skipped;
    /// this fails only when none loads, or when `default` names a model that
    /// did not load.
    pub fn open(dir: &Path, default: &str, loader: Loader) -> Result<Registry, Error> {
        let listing = list_bundles(dir)?;
        if listing.is_empty() {
            return Err(Error::NoBundles {
                dir: dir.to_path_buf(),
            });
        }
        let (tx, _) = watch::channel(Arc::new(Models::default()));
        let registry = Registry {
            dir: dir.to_path_buf(),
            default_setting: default.to_string(),
            loader,
            current: RwLock::new(Arc::new(Models::default())),
            scan: Mutex::new(ScanState::default()),
            changes: tx,
        };
        let report = registry.rescan_listing(listing, false);
        let models = registry.snapshot();
        if models.is_empty() {
            return Err(Error::NoneLoaded {
                dir: dir.to_path_buf(),
                failures: report.failed,
            });
        }
        if !default.is_empty() && models.default_id().is_none() {
            return Err(Error::DefaultMissing {
                id: default.to_string(),
                dir: dir.to_path_buf(),
                available: models.ids(),
            });
        }
        Ok(registry)
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The models now served; keep the `Arc` for the whole call.
    pub fn snapshot(&self) -> Arc<Models> {
        match self.current.read() {
            Ok(g) => g.clone(),
            // A writer panicked mid-swap; the pointer itself is still whole.
            Err(poisoned) => poisoned.into_inner().clone(),
        }
    }

    /// Notified with the new set after every swap.
    pub fn subscribe(&self) -> watch::Receiver<Arc<Models>> {
        self.changes.subscribe()
    }

    /// Checks the directory and reloads what changed; `force` reloads every
    /// file (SIGHUP). Blocking: run it off the async runtime.
    pub fn rescan(&self, force: bool) -> ReloadReport {
        match list_bundles(&self.dir) {
            Ok(listing) => self.rescan_listing(listing, force),
            Err(e) => {
                // A directory that cannot be read (e.g. a volume being
                // remounted) says nothing about the bundles: keep serving.
                tracing::warn!(error = %e, "models directory unreadable; keeping the loaded models");
                ReloadReport::default()
            }
        }
    }

    fn rescan_listing(&self, listing: BTreeMap<PathBuf, FileStamp>, force: bool) -> ReloadReport {
        let mut guard = match self.scan.lock() {
            Ok(g) => g,
            Err(poisoned) => poisoned.into_inner(),
        };
        let scan = &mut *guard;
        let mut report = ReloadReport::default();
        let mut changed = false;
        let mut by_path: BTreeMap<PathBuf, Arc<LoadedModel>> = BTreeMap::new();
        for (path, stamp) in &listing {
            let previous = scan.by_path.get(path).cloned();
            let unchanged = previous.as_ref().is_some_and(|m| m.stamp == *stamp);
            let tried = scan.last_tried.get(path) == Some(stamp);
            if !force && (unchanged || tried) {
                if let Some(m) = previous {
                    by_path.insert(path.clone(), m);
                }
                continue;
            }
            scan.last_tried.insert(path.clone(), *stamp);
            match (self.loader)(path) {
                Ok(bundle) => {
                    let model = Arc::new(LoadedModel {
                        scorer: bundle.scorer,
                        facts: bundle.facts,
                        path: path.clone(),
                        stamp: *stamp,
                    });
                    tracing::info!(model = model.id(), version = %model.info().version,
                        path = %path.display(), "bundle loaded");
                    report.loaded.push((
                        model.id().to_string(),
                        model.info().version.clone(),
                        path.clone(),
                    ));
                    by_path.insert(path.clone(), model);
                    changed = true;
                }
                Err(reason) => {
                    match &previous {
                        Some(m) => {
                            tracing::error!(path = %path.display(), %reason, model = m.id(),
                                version = %m.info().version,
                                "bundle failed to load; still serving the previous version");
                            by_path.insert(path.clone(), m.clone());
                        }
                        None => tracing::error!(path = %path.display(), %reason,
                            "bundle failed to load; skipped"),
                    }
                    report.failed.push((path.clone(), reason));
                }
            }
        }
        for path in scan.by_path.keys() {
            if !listing.contains_key(path) {
                tracing::info!(path = %path.display(), "bundle removed; its model is no longer served");
                report.removed.push(path.clone());
                changed = true;
            }
        }
        scan.last_tried.retain(|p, _| listing.contains_key(p));
        if changed {
            let models = Arc::new(self.assemble(&by_path));
            match self.current.write() {
                Ok(mut g) => *g = models.clone(),
                Err(poisoned) => *poisoned.into_inner() = models.clone(),
            }
            self.changes.send_replace(models);
            report.swapped = true;
        }
        scan.by_path = by_path;
        report
    }

    /// Builds the served set. When two files hold the same model id, the
    /// most recently modified wins (an operator dropping in a new version
    /// under a new file name expects it to take over).
    fn assemble(&self, by_path: &BTreeMap<PathBuf, Arc<LoadedModel>>) -> Models {
        let mut by_id: BTreeMap<String, Arc<LoadedModel>> = BTreeMap::new();
        for m in by_path.values() {
            match by_id.get(m.id()) {
                Some(other) if other.stamp.modified >= m.stamp.modified => {
                    tracing::warn!(model = m.id(), kept = %other.path.display(),
                        shadowed = %m.path.display(), "two bundles share a model id");
                }
                Some(other) => {
                    tracing::warn!(model = m.id(), kept = %m.path.display(),
                        shadowed = %other.path.display(), "two bundles share a model id");
                    by_id.insert(m.id().to_string(), m.clone());
                }
                None => {
                    by_id.insert(m.id().to_string(), m.clone());
                }
            }
        }
        let default_id = if self.default_setting.is_empty() {
            by_id.keys().next().cloned()
        } else if by_id.contains_key(&self.default_setting) {
            Some(self.default_setting.clone())
        } else {
            if !by_id.is_empty() {
                tracing::error!(default = %self.default_setting,
                    "the default model is not loaded; requests must name a model");
            }
            None
        };
        Models { by_id, default_id }
    }
}

/// Every `*.plumb` file in `dir` (following symbolic links) with its stamp.
fn list_bundles(dir: &Path) -> Result<BTreeMap<PathBuf, FileStamp>, Error> {
    let unreadable = |source| Error::DirUnreadable {
        dir: dir.to_path_buf(),
        source,
    };
    let mut out = BTreeMap::new();
    for entry in std::fs::read_dir(dir).map_err(unreadable)? {
        let path = entry.map_err(unreadable)?.path();
        if path.extension().is_none_or(|e| e != "plumb") {
            continue;
        }
        // A file vanishing between listing and stat is simply not there.
        if let Ok(meta) = std::fs::metadata(&path)
            && meta.is_file()
        {
            out.insert(path, FileStamp::of(&meta));
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::models::Hyper;
    use crate::scoring::Direction;

    struct Fixed(ModelInfo);
    impl Scorer for Fixed {
        fn info(&self) -> &ModelInfo {
            &self.0
        }
        fn score(&self, _x: ArrayView2<f64>, _c: f64) -> Vec<CandidateScore> {
            Vec::new()
        }
    }

    /// Test bundles are text files "id version"; "broken" fails to load.
    fn loader() -> Loader {
        Arc::new(|path: &Path| {
            let text = std::fs::read_to_string(path).map_err(|e| e.to_string())?;
            let mut parts = text.split_whitespace();
            let id = parts.next().ok_or("empty file")?.to_string();
            if id == "broken" {
                return Err("checksum mismatch".into());
            }
            let version = parts.next().unwrap_or("v0").to_string();
            Ok(Bundle {
                scorer: Arc::new(Fixed(ModelInfo {
                    id,
                    version,
                    endpoint: "pIC50".into(),
                    unit: String::new(),
                    direction: Direction::Higher,
                    hyper: Hyper::Ridge { alpha: 1.0 },
                    descriptor_names: vec!["a".into()],
                    default_confidence: 0.9,
                })),
                facts: CardFacts::default(),
            })
        })
    }

    fn write(dir: &Path, name: &str, text: &str) {
        // Write then rename, as an operator rolling out a bundle should.
        let tmp = dir.join(format!("{name}.tmp"));
        std::fs::write(&tmp, text).unwrap();
        std::fs::rename(&tmp, dir.join(name)).unwrap();
    }

    #[test]
    fn loads_every_bundle_skips_broken_ones_and_picks_a_default() {
        let dir = tempfile::tempdir().unwrap();
        write(dir.path(), "b.plumb", "beta 1");
        write(dir.path(), "a.plumb", "alpha 1");
        write(dir.path(), "c.plumb", "broken");
        write(dir.path(), "notes.txt", "gamma 1");
        let r = Registry::open(dir.path(), "", loader()).unwrap();
        let m = r.snapshot();
        assert_eq!(m.ids(), vec!["alpha", "beta"]);
        assert_eq!(m.default_id(), Some("alpha"));
        assert_eq!(m.get("").unwrap().id(), "alpha");
        assert_eq!(m.get("beta").unwrap().info().version, "1");
        let err = m.get("gamma").unwrap_err().to_string();
        assert!(
            err.contains("gamma") && err.contains("alpha, beta"),
            "{err}"
        );
        let r = Registry::open(dir.path(), "beta", loader()).unwrap();
        let ids: Vec<String> = r
            .snapshot()
            .default_first()
            .iter()
            .map(|m| m.id().to_string())
            .collect();
        assert_eq!(ids, vec!["beta", "alpha"]);
    }

    #[test]
    fn start_fails_only_when_nothing_loads_or_the_default_is_missing() {
        let dir = tempfile::tempdir().unwrap();
        let err = Registry::open(dir.path(), "", loader()).err().unwrap();
        assert!(matches!(err, Error::NoBundles { .. }), "{err}");
        write(dir.path(), "x.plumb", "broken");
        let err = Registry::open(dir.path(), "", loader()).err().unwrap();
        assert!(err.to_string().contains("checksum mismatch"), "{err}");
        write(dir.path(), "y.plumb", "alpha 1");
        let err = Registry::open(dir.path(), "omega", loader()).err().unwrap();
        assert!(matches!(err, Error::DefaultMissing { .. }), "{err}");
        assert!(Registry::open(dir.path(), "alpha", loader()).is_ok());
        let err = Registry::open(&dir.path().join("missing"), "", loader())
            .err()
            .unwrap();
        assert!(matches!(err, Error::DirUnreadable { .. }), "{err}");
    }

    #[test]
    fn reload_swaps_new_versions_keeps_old_on_failure_and_drops_removed() {
        let dir = tempfile::tempdir().unwrap();
        write(dir.path(), "a.plumb", "alpha 1");
        write(dir.path(), "b.plumb", "beta 1");
        let r = Registry::open(dir.path(), "", loader()).unwrap();
        let mut changes = r.subscribe();
        let before = r.snapshot();

        assert_eq!(r.rescan(false), ReloadReport::default(), "nothing changed");

        write(dir.path(), "a.plumb", "alpha 2");
        let report = r.rescan(false);
        assert!(report.swapped);
        assert_eq!(report.loaded.len(), 1);
        assert!(changes.has_changed().unwrap());
        let after = r.snapshot();
        assert_eq!(after.get("alpha").unwrap().info().version, "2");
        // A call that took the old snapshot keeps the old model.
        assert_eq!(before.get("alpha").unwrap().info().version, "1");
        // beta was not reloaded: the same Arc is served.
        assert!(Arc::ptr_eq(
            &before.get("beta").unwrap(),
            &after.get("beta").unwrap()
        ));
        changes.mark_unchanged();

        write(dir.path(), "a.plumb", "broken new version");
        let report = r.rescan(false);
        assert!(!report.swapped);
        assert_eq!(report.failed.len(), 1);
        assert_eq!(r.snapshot().get("alpha").unwrap().info().version, "2");
        // The broken file is not retried on every poll...
        assert_eq!(r.rescan(false).failed.len(), 0);
        // ...but is on a forced reload.
        assert_eq!(r.rescan(true).failed.len(), 1);
        assert_eq!(r.snapshot().get("alpha").unwrap().info().version, "2");

        std::fs::remove_file(dir.path().join("b.plumb")).unwrap();
        let report = r.rescan(false);
        assert!(report.swapped);
        assert_eq!(report.removed, vec![dir.path().join("b.plumb")]);
        assert_eq!(r.snapshot().ids(), vec!["alpha"]);
        assert!(changes.has_changed().unwrap());
    }

    #[test]
    fn the_newest_file_wins_when_two_share_an_id() {
        let dir = tempfile::tempdir().unwrap();
        write(dir.path(), "z-old.plumb", "alpha 1");
        let r = Registry::open(dir.path(), "", loader()).unwrap();
        std::thread::sleep(std::time::Duration::from_millis(20));
        write(dir.path(), "a-new.plumb", "alpha 2");
        r.rescan(false);
        assert_eq!(r.snapshot().get("alpha").unwrap().info().version, "2");
    }
}
