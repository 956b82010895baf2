//! Principal component analysis of standardised descriptor rows: the small
//! space the applicability-domain guard measures distances, leverage and
//! residuals in.
//!
//! The covariance uses the n − 1 denominator, as scikit-learn's `PCA`, so
//! eigenvalues are sample variances along each component. Components are
//! sorted by variance and each is signed so that its largest-|loading| entry
//! is positive: eigensolvers return either sign, and a bundle must give the
//! same scores however often it is refitted.

use ndarray::{Array1, Array2, ArrayView2, Axis};

use crate::linalg;

/// The most components PCA keeps: the k-d tree of the domain guard has this
/// one const dimension, and k-d trees lose to brute force well before 32.
pub const MAX_COMPONENTS: usize = 16;

/// Errors of fitting or rebuilding a PCA.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum Error {
    #[error("PCA needs at least 2 rows to estimate a covariance, got {rows}; add training rows")]
    TooFewRows { rows: usize },
    #[error("PCA needs at least 1 descriptor column, got 0")]
    NoDescriptors,
    #[error(
        "the training descriptors have no variance (every row is the same point); \
         the domain cannot be measured: check the input table"
    )]
    NoVariance,
    #[error("PCA input has a non-finite value {value} at row {row}, column {column}")]
    NonFinite {
        row: usize,
        column: usize,
        value: f64,
    },
    #[error("PCA setting {name} = {value} is invalid: expected {expected}")]
    Setting {
        name: &'static str,
        value: String,
        expected: &'static str,
    },
    #[error(
        "stored PCA is inconsistent: {problem}; the model file is damaged or from another version"
    )]
    Inconsistent { problem: String },
    #[error("PCA eigendecomposition failed: {0}")]
    Linalg(#[from] linalg::Error),
}

/// A fitted PCA. All fields are plain data so a model file can store them;
/// [`Pca::check`] validates a rebuilt one.
#[derive(Clone, Debug, PartialEq)]
pub struct Pca {
    /// Column means of the rows it was fitted on (length d).
    pub mean: Array1<f64>,
    /// Kept components as rows (p × d), orthonormal, sorted by variance.
    pub components: Array2<f64>,
    /// Variance along each kept component, n − 1 denominator (length p).
    pub eigenvalues: Array1<f64>,
    /// Each kept component's share of the total variance (length p).
    pub explained_variance_ratio: Array1<f64>,
    /// Sum of the variances of all descriptors (the trace of the covariance).
    pub total_variance: f64,
    /// Number of rows it was fitted on.
    pub n_samples: usize,
}

impl Pca {
    /// Fits on the rows of `x` and keeps the fewest components whose
    /// variances add up to at least `variance_fraction` of the total, but
    /// no more than `max_components` (≤ [`MAX_COMPONENTS`]) and no more than
    /// the numerical rank. (scikit-learn's fractional `n_components` asks
    /// for strictly more than the fraction; the two agree unless a
    /// cumulative ratio hits the fraction exactly.)
    pub fn fit(
        x: ArrayView2<f64>,
        variance_fraction: f64,
        max_components: usize,
    ) -> Result<Pca, Error> {
        check_settings(variance_fraction, max_components)?;
        let (n, d) = x.dim();
        if n < 2 {
            return Err(Error::TooFewRows { rows: n });
        }
        if d == 0 {
            return Err(Error::NoDescriptors);
        }
        if let Some(((row, column), &value)) = x.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(Error::NonFinite { row, column, value });
        }
        let mean = x.mean_axis(Axis(0)).ok_or(Error::TooFewRows { rows: n })?;
        let centred = &x - &mean;
        let (values, vectors) = spectrum(centred.view())?;
        let total_variance: f64 = values.iter().sum();
        if total_variance.is_nan() || total_variance <= 0.0 {
            return Err(Error::NoVariance);
        }
        let largest = values.first().copied().unwrap_or(0.0);
        // Directions with a variance this small relative to the largest are
        // rounding noise (rank deficiency), not structure.
        let rank = values
            .iter()
            .take_while(|&&v| v > largest * 1e-12 * d.max(n) as f64)
            .count();
        let p = components_for(&values, total_variance, variance_fraction)
            .min(max_components)
            .min(rank)
            .max(1);
        let mut components = Array2::zeros((p, d));
        for (j, mut row) in components.axis_iter_mut(Axis(0)).enumerate() {
            let mut direction = vectors.column(j).to_vec();
            fix_sign(&mut direction);
            row.assign(&Array1::from(direction));
        }
        let eigenvalues = Array1::from_iter(values.iter().take(p).copied());
        let explained_variance_ratio = eigenvalues.mapv(|v| v / total_variance);
        Ok(Pca {
            mean,
            components,
            eigenvalues,
            explained_variance_ratio,
            total_variance,
            n_samples: n,
        })
    }

    pub fn n_components(&self) -> usize {
        self.components.nrows()
    }

    pub fn n_features(&self) -> usize {
        self.mean.len()
    }

    /// The share of the total variance the kept components explain.
    pub fn explained_variance(&self) -> f64 {
        self.explained_variance_ratio.sum()
    }

    /// Scores of the rows of `x` (B × p): centred rows times the components,
    /// one GEMM.
    pub fn scores(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let centred = &x - &self.mean;
        linalg::matmul_t(centred.view(), self.components.view())
    }

    /// The Q statistic of each row: the squared norm of the part of the
    /// centred row that the kept components do not explain.
    pub fn residual(&self, x: ArrayView2<f64>) -> Array1<f64> {
        self.scores_and_residuals(x).1
    }

    /// Scores and Q statistics together, centring once. Q is taken from the
    /// reconstruction x − t·V rather than as ‖x‖² − ‖t‖², which would lose
    /// the small residuals of well-explained rows to cancellation.
    pub fn scores_and_residuals(&self, x: ArrayView2<f64>) -> (Array2<f64>, Array1<f64>) {
        let centred = &x - &self.mean;
        let scores = linalg::matmul_t(centred.view(), self.components.view());
        let reconstructed = linalg::matmul(scores.view(), self.components.view());
        let residual = Array1::from_iter(
            centred
                .axis_iter(Axis(0))
                .zip(reconstructed.axis_iter(Axis(0)))
                .map(|(c, r)| c.iter().zip(r.iter()).map(|(a, b)| (a - b).powi(2)).sum()),
        );
        (scores, residual)
    }

    /// Validates a PCA rebuilt from stored parts: shapes agree, values are
    /// finite, variances positive and components orthonormal.
    pub fn check(&self) -> Result<(), Error> {
        let bad = |problem: String| Err(Error::Inconsistent { problem });
        let (p, d) = self.components.dim();
        if p == 0 || p > MAX_COMPONENTS {
            return bad(format!("{p} components, expected 1..={MAX_COMPONENTS}"));
        }
        if self.mean.len() != d {
            return bad(format!(
                "mean has {} entries, components have {d} columns",
                self.mean.len()
            ));
        }
        if self.eigenvalues.len() != p || self.explained_variance_ratio.len() != p {
            return bad(format!(
                "{} eigenvalues and {} variance ratios for {p} components",
                self.eigenvalues.len(),
                self.explained_variance_ratio.len()
            ));
        }
        if self.n_samples < 2 {
            return bad(format!("fitted on {} rows", self.n_samples));
        }
        let finite = self
            .mean
            .iter()
            .chain(self.components.iter())
            .all(|v| v.is_finite());
        if !(finite && self.total_variance.is_finite() && self.total_variance > 0.0) {
            return bad("non-finite mean, component or total variance".into());
        }
        if let Some(v) = self
            .eigenvalues
            .iter()
            .find(|v| !(v.is_finite() && **v > 0.0))
        {
            return bad(format!("eigenvalue {v} is not a positive variance"));
        }
        let gram = linalg::matmul_t(self.components.view(), self.components.view());
        for ((i, j), g) in gram.indexed_iter() {
            let want = if i == j { 1.0 } else { 0.0 };
            if (g - want).abs() > 1e-8 {
                return bad(format!(
                    "components {i} and {j} are not orthonormal (dot {g})"
                ));
            }
        }
        Ok(())
    }
}

/// Validates the two PCA settings.
pub fn check_settings(variance_fraction: f64, max_components: usize) -> Result<(), Error> {
    if !(variance_fraction > 0.0 && variance_fraction <= 1.0) {
        return Err(Error::Setting {
            name: "variance_fraction",
            value: variance_fraction.to_string(),
            expected: "a fraction in (0, 1]",
        });
    }
    if max_components == 0 || max_components > MAX_COMPONENTS {
        return Err(Error::Setting {
            name: "max_components",
            value: max_components.to_string(),
            expected: "an integer in 1..=16 (the k-d tree dimension)",
        });
    }
    Ok(())
}

/// Variances (descending, n − 1 denominator) and the matching unit
/// directions as columns. When there are fewer rows than descriptors the
/// n × n Gram matrix XXᵀ has the same non-zero spectrum as the d × d XᵀX and
/// is far cheaper; the directions follow as v = Xᵀu/√s.
fn spectrum(centred: ArrayView2<f64>) -> Result<(Vec<f64>, Array2<f64>), Error> {
    let (n, d) = centred.dim();
    let denom = (n - 1) as f64;
    if n < d {
        let gram = linalg::matmul_t(centred, centred);
        let (s, u) = linalg::sym_eigen(gram.view())?;
        let order: Vec<usize> = (0..n).rev().collect();
        let values: Vec<f64> = order.iter().map(|&i| s[i].max(0.0) / denom).collect();
        let u_sorted = Array2::from_shape_fn((n, n), |(r, c)| u[[r, order[c]]]);
        let mut v = linalg::matmul(centred.t(), u_sorted.view());
        for (c, mut col) in v.axis_iter_mut(Axis(1)).enumerate() {
            let norm = s[order[c]].max(0.0).sqrt();
            if norm > 0.0 {
                col.mapv_inplace(|e| e / norm);
            }
        }
        Ok((values, v))
    } else {
        let scatter = linalg::matmul(centred.t(), centred);
        let (s, vecs) = linalg::sym_eigen(scatter.view())?;
        let order: Vec<usize> = (0..d).rev().collect();
        let values = order.iter().map(|&i| s[i].max(0.0) / denom).collect();
        let v = Array2::from_shape_fn((d, d), |(r, c)| vecs[[r, order[c]]]);
        Ok((values, v))
    }
}

/// The fewest leading components whose variances reach the fraction.
fn components_for(values: &[f64], total: f64, fraction: f64) -> usize {
    let mut cumulative = 0.0;
    for (j, v) in values.iter().enumerate() {
        cumulative += v / total;
        // A hair of slack so that a fraction of 1.0 is reached despite
        // rounding in the cumulative sum.
        if cumulative >= fraction - 1e-12 {
            return j + 1;
        }
    }
    values.len()
}

/// Flips a component so its largest-|loading| entry (the first, on ties) is
/// positive.
fn fix_sign(component: &mut [f64]) {
    let mut best = 0;
    for (i, v) in component.iter().enumerate() {
        if v.abs() > component[best].abs() {
            best = i;
        }
    }
    if component.get(best).is_some_and(|&v| v < 0.0) {
        component.iter_mut().for_each(|v| *v = -*v);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn a_line_in_the_plane_has_one_component_along_it() {
        // Points on y = 2x: all variance lies along (1, 2)/√5 (by hand).
        let x = array![[0.0, 0.0], [1.0, 2.0], [2.0, 4.0], [3.0, 6.0]];
        let pca = Pca::fit(x.view(), 0.9, 10).unwrap();
        assert_eq!(pca.n_components(), 1);
        let v = pca.components.row(0);
        assert!((v[0] - 1.0 / 5f64.sqrt()).abs() < 1e-12);
        assert!((v[1] - 2.0 / 5f64.sqrt()).abs() < 1e-12);
        // Sample variance of t = √5·(x − 1.5) for x = 0..3: 5 · 5/3 (by hand).
        assert!((pca.eigenvalues[0] - 25.0 / 3.0).abs() < 1e-10);
        let off = array![[1.0, 0.0]];
        // (1, 0) − mean (1.5, 3) = (−0.5, −3); its distance² to the line
        // through the mean along (1, 2) is (2·(−0.5) − (−3))²/5 = 4/5.
        assert!((pca.residual(off.view())[0] - 0.8).abs() < 1e-12);
    }

    #[test]
    fn sign_convention_makes_the_largest_loading_positive() {
        let mut v = [0.1, -0.9, 0.3];
        fix_sign(&mut v);
        assert_eq!(v, [-0.1, 0.9, -0.3]);
        let mut w = [0.5, -0.5];
        fix_sign(&mut w);
        assert_eq!(w, [0.5, -0.5], "ties go to the first entry");
    }

    #[test]
    fn bad_settings_and_inputs_are_refused() {
        let x = array![[0.0, 1.0], [1.0, 0.0], [2.0, 2.0]];
        assert!(matches!(
            Pca::fit(x.view(), 0.0, 2),
            Err(Error::Setting {
                name: "variance_fraction",
                ..
            })
        ));
        assert!(matches!(
            Pca::fit(x.view(), 0.9, 17),
            Err(Error::Setting {
                name: "max_components",
                ..
            })
        ));
        assert_eq!(
            Pca::fit(x.slice(ndarray::s![..1, ..]), 0.9, 2),
            Err(Error::TooFewRows { rows: 1 })
        );
        let same = array![[1.0, 1.0], [1.0, 1.0]];
        assert_eq!(Pca::fit(same.view(), 0.9, 2), Err(Error::NoVariance));
        let nan = array![[1.0, f64::NAN], [1.0, 2.0]];
        assert!(matches!(
            Pca::fit(nan.view(), 0.9, 2),
            Err(Error::NonFinite {
                row: 0,
                column: 1,
                ..
            })
        ));
    }
}
