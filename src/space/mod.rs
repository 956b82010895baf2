//! The descriptor space a model sees: standardisation here, PCA in `pca`.

pub mod pca;

use ndarray::{Array1, Array2, ArrayView2, Axis};

/// Per-descriptor centring and scaling by the population standard deviation
/// (ddof = 0, as scikit-learn's `StandardScaler`). A descriptor that is
/// constant on the rows it was fitted on keeps scale 1, so it is centred but
/// not blown up.
#[derive(Clone, Debug, PartialEq)]
pub struct Standardizer {
    pub mean: Array1<f64>,
    pub scale: Array1<f64>,
}

impl Standardizer {
    /// Fits on the rows of `x` (at least one row).
    pub fn fit(x: ArrayView2<f64>) -> Standardizer {
        let n = x.nrows().max(1) as f64;
        let mean = x.sum_axis(Axis(0)) / n;
        let mut scale = Array1::zeros(x.ncols());
        for (j, col) in x.axis_iter(Axis(1)).enumerate() {
            let var = col.iter().map(|v| (v - mean[j]).powi(2)).sum::<f64>() / n;
            let sd = var.sqrt();
            scale[j] = if sd > 1e-12 * (1.0 + mean[j].abs()) {
                sd
            } else {
                1.0
            };
        }
        Standardizer { mean, scale }
    }

    pub fn transform(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let mut out = x.to_owned();
        for mut row in out.axis_iter_mut(Axis(0)) {
            for (j, v) in row.iter_mut().enumerate() {
                *v = (*v - self.mean[j]) / self.scale[j];
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn standardised_columns_have_zero_mean_and_unit_population_sd() {
        let x = array![[1.0, 5.0, 2.0], [2.0, 5.0, 4.0], [3.0, 5.0, 9.0]];
        let s = Standardizer::fit(x.view());
        let z = s.transform(x.view());
        // Column 0: mean 2, population sd sqrt(2/3) (by hand).
        assert!((s.scale[0] - (2.0f64 / 3.0).sqrt()).abs() < 1e-15);
        assert_eq!(s.scale[1], 1.0, "constant column keeps scale 1");
        for j in [0, 2] {
            let c = z.column(j);
            assert!(c.sum().abs() < 1e-12);
            assert!(((c.dot(&c) / 3.0) - 1.0).abs() < 1e-12);
        }
    }
}
