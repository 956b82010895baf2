//! Nested cross-validation (Varma & Simon, BMC Bioinformatics 2006; Cawley &
//! Talbot, JMLR 2010): the outer loop estimates the whole procedure,
//! selection included; the inner loop selects. Only outer figures are
//! claims. Around it: the choice of family, the random-split comparison,
//! y-randomisation in the same pass, and the final selection on all rows.

use std::sync::atomic::{AtomicUsize, Ordering};

use ndarray::{Array2, ArrayView1, ArrayView2, Axis, s};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::folds::{FoldDesign, derive_seed};
use super::metrics::{MetricEstimates, metrics};
use super::search::{GridCv, GridPredictFn, grid_cv, one_se_choice};
use super::yrand::{YRandomization, permutation_p_value, permuted_targets};
use super::{Error, Estimate, Folds, Metrics};
use crate::models::{Family, Grid, Hyper};
use crate::space::Standardizer;

/// Seed streams (see [`derive_seed`]): the outer folds use the seed itself,
/// so they can be rebuilt from it alone; inner folds of outer fold `f` use
/// stream `1 + f`.
const PERMUTATION_STREAM: u64 = 1_000;
const RANDOM_SPLIT_STREAM: u64 = 2_000;

/// The settings of one validation.
///
/// | Name | Default | Purpose | Range |
/// | --- | --- | --- | --- |
/// | `k_outer` | 5 | outer folds: the claims are their mean ± SE | 2 ..= rows (see `data::rows_needed`) |
/// | `k_inner` | 5 | inner folds: the one-SE selection | 2 ..= outer-training rows |
/// | `seed` | 1 | every random choice (folds, permutations) derives from it | any u64 |
/// | `n_permutations` | 10 | y-randomisation permutations; the p-value cannot go below 1/(P+1) | 0 (off) or more |
/// | `compare_random_split` | on | rerun the chosen family under random folds | on, off |
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct NestedSettings {
    /// Outer folds (the claims), default 5.
    pub k_outer: usize,
    /// Inner folds (the selection), default 5.
    pub k_inner: usize,
    /// Every random choice derives from it.
    pub seed: u64,
    /// y-randomisation permutations, default 10.
    pub n_permutations: usize,
    /// Also run the procedure under a random split (ignored when the design
    /// is random already), default on.
    pub compare_random_split: bool,
}

impl Default for NestedSettings {
    fn default() -> Self {
        NestedSettings {
            k_outer: 5,
            k_inner: 5,
            seed: 1,
            n_permutations: 10,
            compare_random_split: true,
        }
    }
}

/// A progress report: `(stage, done, total)`, counted in outer folds across
/// every stage (each family's nested pass, the random-split comparison, the
/// final selection as one step). Called from worker threads.
pub type Progress<'a> = dyn Fn(&str, usize, usize) + Sync + 'a;

/// One outer fold of one family's nested pass.
#[derive(Clone, Debug)]
pub struct OuterFold {
    pub fold: usize,
    /// Indices into the table.
    pub train_rows: Vec<usize>,
    pub test_rows: Vec<usize>,
    /// The grid index chosen by the inner search for each target column
    /// (0 = the real target, then the permutations).
    pub chosen: Vec<usize>,
    /// The setting chosen for the real target.
    pub hyper: Hyper,
    /// Outer-test metrics of the real target.
    pub metrics: Metrics,
    /// The lowest mean inner test MSE over the grid for the real target:
    /// what a plain grid search on these rows would report (optimistic).
    pub inner_best_mse: f64,
    /// The inner folds, over positions in `train_rows`.
    pub inner_folds: Folds,
    /// At the chosen setting: y − ŷ of each outer-training row, ŷ by the
    /// inner fold model that held it out (the row's CV+ residual).
    pub inner_residuals: Vec<f64>,
    /// At the chosen setting: `[[j, k]]` is inner fold model `k`'s
    /// prediction of outer-test row `j` (what CV+ would combine).
    pub inner_test_predictions: Array2<f64>,
    /// The refit at the chosen setting on all outer-training rows: its
    /// predictions of the outer-test rows, in `test_rows` order.
    pub test_predictions: Vec<f64>,
}

/// One family through the outer cross-validation.
#[derive(Clone, Debug)]
pub struct FamilyNested {
    pub family: Family,
    pub grid: Grid,
    pub outer: Vec<OuterFold>,
    /// Outer-fold metrics as mean ± SE: the family's claims.
    pub claims: MetricEstimates,
    /// The claimed q² (mean over outer folds) of each permuted target.
    pub permuted_q2: Vec<f64>,
    /// Every row's outer-test prediction (real target).
    pub outer_predictions: Vec<f64>,
}

/// The final selection on all rows at the chosen family: the CV+ fold
/// models' setting, their out-of-fold residuals and the report's curves.
#[derive(Clone, Debug)]
pub struct FinalSelection {
    /// Fitted on all rows; the fold models and the served model use it.
    pub standardizer: Standardizer,
    /// The full-data folds (the outer folds of the nested pass).
    pub folds: Folds,
    /// Train and test MSE per grid point, mean ± SE over folds (the curves).
    pub cv: GridCv,
    pub chosen: usize,
    pub hyper: Hyper,
    /// Each row's prediction by the fold model that held it out.
    pub oof_predictions: Vec<f64>,
    /// y − ŷ at the chosen setting: the CV+ calibration residuals.
    pub residuals: Vec<f64>,
    /// What a plain grid search would pick (lowest mean test MSE) and
    /// report; optimistic, shown beside the nested claims.
    pub plain_best: usize,
    pub plain_best_mse: Estimate,
    pub plain_best_q2: Estimate,
}

/// Everything the validation found.
#[derive(Clone, Debug)]
pub struct Validation {
    /// The fold design's name (`random`, `cluster`, `group`, `time`).
    pub design: &'static str,
    pub settings: NestedSettings,
    pub outer_folds: Folds,
    /// Every family tried, simplest first.
    pub families: Vec<FamilyNested>,
    pub chosen_family: Family,
    /// The chosen family's claims under random folds; `None` when the
    /// design is random (the claims are that) or the comparison is off.
    pub random_split: Option<MetricEstimates>,
    pub y_randomization: YRandomization,
    pub final_selection: FinalSelection,
}

impl Validation {
    /// The chosen family's nested pass.
    // The `expect` cannot fail: `chosen_family` is picked from `families`
    // when the validation is built, and neither changes afterwards.
    #[allow(clippy::expect_used)]
    pub fn chosen(&self) -> &FamilyNested {
        self.families
            .iter()
            .find(|f| f.family == self.chosen_family)
            .expect("the chosen family is one of those tried")
    }

    /// The claims: the chosen family's outer-fold metrics.
    pub fn claims(&self) -> &MetricEstimates {
        &self.chosen().claims
    }
}

/// Runs the whole validation with the real model families
/// ([`crate::models::grid_predict`]).
pub fn validate_with_models(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    design: &FoldDesign,
    grids: &[Grid],
    settings: &NestedSettings,
    progress: &Progress,
) -> Result<Validation, Error> {
    validate(
        x,
        y,
        design,
        grids,
        settings,
        &crate::models::grid_predict,
        progress,
    )
}

/// Runs the whole validation: every family of `grids` through the same
/// nested cross-validation (with the y-randomisation permutations as extra
/// target columns), the simplest family within one SE of the best chosen
/// (one-SE rule over `Family::BY_SIMPLICITY`), the random-split comparison,
/// and the final selection on all rows.
///
/// `x` holds the raw descriptors: each outer fold standardises on its own
/// training rows, so no outer-test row leaks into the scaling.
pub fn validate(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    design: &FoldDesign,
    grids: &[Grid],
    settings: &NestedSettings,
    predict: &GridPredictFn,
    progress: &Progress,
) -> Result<Validation, Error> {
    check_inputs(x, y, design, grids)?;
    let grids = by_simplicity(grids);
    let n = y.len();
    let all_rows: Vec<usize> = (0..n).collect();
    let outer_folds = design.folds(&all_rows, settings.k_outer, settings.seed)?;
    let permutation_seed = derive_seed(settings.seed, PERMUTATION_STREAM);
    let targets = permuted_targets(y, settings.n_permutations, permutation_seed);
    let compare = settings.compare_random_split && *design != FoldDesign::Random;
    let total = settings.k_outer * (grids.len() + usize::from(compare)) + 1;
    let ticker = Ticker {
        done: AtomicUsize::new(0),
        total,
        progress,
    };
    let pass = NestedPass {
        // Views are invariant in their lifetime: shorten it to the pass's.
        x: x.reborrow(),
        y: targets.view(),
        design,
        folds: &outer_folds,
        settings,
        seed: settings.seed,
        predict,
        ticker: &ticker,
    };
    let families = grids
        .iter()
        .map(|grid| pass.run(grid, &format!("nested CV ({})", grid.family.name())))
        .collect::<Result<Vec<_>, _>>()?;
    let chosen = choose_family(&families);
    let chosen_grid = &families[chosen].grid;
    let random_split = if compare {
        Some(random_split_claims(&pass, chosen_grid)?)
    } else {
        None
    };
    let final_selection = final_selection(x, y, &outer_folds, chosen_grid, predict)?;
    ticker.tick("final selection");
    let real_q2 = families[chosen].claims.r2.mean;
    let permuted_q2 = families[chosen].permuted_q2.clone();
    Ok(Validation {
        design: design.name(),
        settings: *settings,
        outer_folds,
        chosen_family: families[chosen].family,
        random_split,
        y_randomization: YRandomization {
            real_q2,
            p_value: permutation_p_value(real_q2, &permuted_q2),
            permuted_q2,
            seed: permutation_seed,
        },
        final_selection,
        families,
    })
}

fn check_inputs(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    design: &FoldDesign,
    grids: &[Grid],
) -> Result<(), Error> {
    if grids.is_empty() {
        return Err(Error::NoFamilies);
    }
    if x.nrows() != y.len() || design.n_rows().is_some_and(|m| m != y.len()) {
        return Err(Error::Shape {
            what: format!(
                "x has {} rows, y {}, the fold design {}",
                x.nrows(),
                y.len(),
                design.n_rows().map_or("any".to_owned(), |m| m.to_string())
            ),
        });
    }
    if let Some(row) = y.iter().position(|v| !v.is_finite()) {
        return Err(Error::NonFiniteInput { what: "y", row });
    }
    if let Some(((row, _), _)) = x.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(Error::NonFiniteInput { what: "x", row });
    }
    Ok(())
}

/// The grids in `Family::BY_SIMPLICITY` order, so the family choice can
/// apply the one-SE rule to them as to a grid.
fn by_simplicity(grids: &[Grid]) -> Vec<Grid> {
    let rank = |f: Family| Family::BY_SIMPLICITY.iter().position(|&g| g == f);
    let mut sorted = grids.to_vec();
    sorted.sort_by_key(|g| rank(g.family));
    sorted
}

/// The simplest family whose outer MSE is within one SE of the best
/// family's (the one-SE rule applied to families ordered by simplicity).
fn choose_family(families: &[FamilyNested]) -> usize {
    let means: Vec<f64> = families.iter().map(|f| f.claims.mse.mean).collect();
    let ses: Vec<f64> = families.iter().map(|f| f.claims.mse.se).collect();
    one_se_choice(&means, &ses)
}

fn random_split_claims(pass: &NestedPass, grid: &Grid) -> Result<MetricEstimates, Error> {
    let seed = derive_seed(pass.settings.seed, RANDOM_SPLIT_STREAM);
    let n = pass.x.nrows();
    let folds = Folds::random(n, pass.settings.k_outer, seed)?;
    let random = NestedPass {
        x: pass.x.reborrow(),
        y: pass.y.slice_move(s![.., 0..1]).reborrow(),
        design: &FoldDesign::Random,
        folds: &folds,
        settings: pass.settings,
        seed,
        predict: pass.predict,
        ticker: pass.ticker,
    };
    Ok(random.run(grid, "random-split comparison")?.claims)
}

struct Ticker<'a> {
    done: AtomicUsize,
    total: usize,
    progress: &'a Progress<'a>,
}

impl Ticker<'_> {
    fn tick(&self, stage: &str) {
        let done = self.done.fetch_add(1, Ordering::Relaxed) + 1;
        (self.progress)(stage, done, self.total);
    }
}

/// One nested pass over fixed outer folds, for any family's grid.
#[derive(Clone, Copy)]
struct NestedPass<'a> {
    x: ArrayView2<'a, f64>,
    /// n × c targets: the real one first, then the permutations.
    y: ArrayView2<'a, f64>,
    design: &'a FoldDesign,
    folds: &'a Folds,
    settings: &'a NestedSettings,
    /// Inner folds of outer fold `f` use `derive_seed(seed, 1 + f)`.
    seed: u64,
    predict: &'a GridPredictFn<'a>,
    ticker: &'a Ticker<'a>,
}

impl NestedPass<'_> {
    fn run(&self, grid: &Grid, stage: &str) -> Result<FamilyNested, Error> {
        // Outer folds in parallel: on two cores this keeps both busy through
        // the model fits, whose own parallelism only pays on large kernels.
        let results: Vec<(OuterFold, Vec<f64>)> = (0..self.folds.k)
            .into_par_iter()
            .map(|f| {
                let r = self.outer_fold(grid, f);
                self.ticker.tick(stage);
                r
            })
            .collect::<Result<_, _>>()?;
        let per_fold: Vec<Metrics> = results.iter().map(|(o, _)| o.metrics).collect();
        let c = self.y.ncols();
        let permuted_q2 = (1..c)
            .map(|ci| results.iter().map(|(_, q2)| q2[ci]).sum::<f64>() / results.len() as f64)
            .collect();
        let mut outer_predictions = vec![f64::NAN; self.y.nrows()];
        for (o, _) in &results {
            for (&row, &p) in o.test_rows.iter().zip(&o.test_predictions) {
                outer_predictions[row] = p;
            }
        }
        Ok(FamilyNested {
            family: grid.family,
            grid: grid.clone(),
            claims: MetricEstimates::over_folds(&per_fold),
            permuted_q2,
            outer_predictions,
            outer: results.into_iter().map(|(o, _)| o).collect(),
        })
    }

    /// One outer fold: standardise on its training rows, select per target
    /// column by the one-SE rule on the inner folds, refit each choice on all
    /// its training rows and score the outer-test rows. Returns the fold and
    /// the outer-test q² of every target column.
    fn outer_fold(&self, grid: &Grid, f: usize) -> Result<(OuterFold, Vec<f64>), Error> {
        let (train_rows, test_rows) = (self.folds.train_rows(f), self.folds.test_rows(f));
        if train_rows.is_empty() || test_rows.is_empty() {
            return Err(Error::EmptyFold {
                fold: f,
                k: self.folds.k,
            });
        }
        let x_train = self.x.select(Axis(0), &train_rows);
        let scaler = Standardizer::fit(x_train.view());
        let xs_train = scaler.transform(x_train.view());
        let xs_test = scaler.transform(self.x.select(Axis(0), &test_rows).view());
        let y_train = self.y.select(Axis(0), &train_rows);
        let y_test = self.y.select(Axis(0), &test_rows);
        let inner_seed = derive_seed(self.seed, 1 + f as u64);
        let inner_folds = self
            .design
            .folds(&train_rows, self.settings.k_inner, inner_seed)
            .map_err(|source| Error::InnerFolds {
                outer_fold: f,
                source: Box::new(source),
            })?;
        let inner = grid_cv(
            grid,
            xs_train.view(),
            y_train.view(),
            &inner_folds,
            Some(xs_test.view()),
            self.predict,
        )?;
        let chosen = (0..self.y.ncols())
            .map(|c| inner.choose(c))
            .collect::<Result<Vec<_>, _>>()?;
        let test_pred = refit(
            grid,
            &chosen,
            xs_train.view(),
            y_train.view(),
            xs_test.view(),
            self.predict,
            f,
        )?;
        let q2 = (0..self.y.ncols())
            .map(|c| metrics(y_test.column(c), test_pred.column(c)).r2)
            .collect();
        let g0 = chosen[0];
        let inner_residuals = (0..train_rows.len())
            .map(|i| y_train[[i, 0]] - inner.oof[[g0, i, 0]])
            .collect();
        let outer = OuterFold {
            fold: f,
            hyper: grid.points[g0],
            metrics: metrics(y_test.column(0), test_pred.column(0)),
            inner_best_mse: inner
                .best(0)
                .map_or(f64::NAN, |g| inner.test_mse[[g, 0]].mean),
            inner_test_predictions: inner
                .extra
                .slice(s![.., g0, ..])
                .t()
                .as_standard_layout()
                .into_owned(),
            inner_residuals,
            inner_folds,
            test_predictions: test_pred.column(0).to_vec(),
            chosen,
            train_rows,
            test_rows,
        };
        Ok((outer, q2))
    }
}

/// Refits each column's chosen setting on all the given training rows and
/// predicts the test rows (m × c). One call over the distinct chosen
/// settings serves every column.
fn refit(
    grid: &Grid,
    chosen: &[usize],
    x_train: ArrayView2<f64>,
    y_train: ArrayView2<f64>,
    x_test: ArrayView2<f64>,
    predict: &GridPredictFn,
    fold: usize,
) -> Result<Array2<f64>, Error> {
    let mut distinct = chosen.to_vec();
    distinct.sort_unstable();
    distinct.dedup();
    let sub = Grid {
        family: grid.family,
        points: distinct.iter().map(|&g| grid.points[g]).collect(),
    };
    let p = predict(&sub, x_train, y_train, x_test);
    let (m, c) = (x_test.nrows(), y_train.ncols());
    if p.test.dim() != (distinct.len(), m, c) {
        return Err(Error::PredictorShape {
            family: grid.family.name(),
            expected: format!("test {:?}", (distinct.len(), m, c)),
            found: format!("test {:?}", p.test.dim()),
        });
    }
    let mut out = Array2::zeros((m, c));
    for (ci, &g) in chosen.iter().enumerate() {
        let at = distinct.binary_search(&g).unwrap_or(0);
        out.column_mut(ci).assign(&p.test.slice(s![at, .., ci]));
        if out.column(ci).iter().any(|v| !v.is_finite()) {
            return Err(Error::NonFinitePredictions {
                family: grid.family.name(),
                setting: format!("{:?}", grid.points[g]),
                stage: format!("refit of outer fold {fold}"),
            });
        }
    }
    Ok(out)
}

/// CV on all rows over the full-data folds, standardised on all rows (the
/// served model's scaling), with the one-SE choice and the CV+ residuals.
fn final_selection(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    folds: &Folds,
    grid: &Grid,
    predict: &GridPredictFn,
) -> Result<FinalSelection, Error> {
    let standardizer = Standardizer::fit(x);
    let xs = standardizer.transform(x);
    let y2 = y.insert_axis(Axis(1));
    let cv = grid_cv(grid, xs.view(), y2, folds, None, predict)?;
    let chosen = cv.choose(0)?;
    let oof_predictions: Vec<f64> = cv.oof.slice(s![chosen, .., 0]).to_vec();
    if oof_predictions.iter().any(|v| !v.is_finite()) {
        return Err(Error::NonFinitePredictions {
            family: grid.family.name(),
            setting: format!("{:?}", grid.points[chosen]),
            stage: "final selection".to_owned(),
        });
    }
    let residuals = y.iter().zip(&oof_predictions).map(|(a, b)| a - b).collect();
    let plain_best = cv.best(0).unwrap_or(chosen);
    Ok(FinalSelection {
        standardizer,
        folds: folds.clone(),
        hyper: grid.points[chosen],
        chosen,
        oof_predictions,
        residuals,
        plain_best,
        plain_best_mse: cv.test_mse[[plain_best, 0]],
        plain_best_q2: cv.test_r2[[plain_best, 0]],
        cv,
    })
}
