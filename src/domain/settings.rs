//! The settings of the applicability-domain guard, with their defaults and
//! the checks that keep them meaningful.

use serde::{Deserialize, Serialize};

use super::Error;
use crate::space::pca;

/// How the domain guard measures and judges candidates.
///
/// | Name | Default | Purpose | Range |
/// | --- | --- | --- | --- |
/// | `k` | 5 | neighbours whose mean distance in PCA space is the k-NN distance | ≥ 1, < training rows |
/// | `variance_fraction` | 0.90 | PCA keeps the fewest components explaining at least this share of the variance | (0, 1] |
/// | `max_components` | 10 | cap on the kept components | 1..=16 (the k-d tree dimension) |
/// | `z` | 0.5 | Z of the Z-rule threshold D̄ + Z·σ over the training leave-one-out k-NN distances (Tropsha, Mol. Inf. 2010) | finite |
/// | `typicality_border` | 0.05 | typicality below this makes a candidate `border` | (0, 1) |
/// | `typicality_outside` | 0.01 | typicality below this makes a candidate `outside` | (0, `typicality_border`] |
/// | `residual_border_quantile` | 0.95 | quantile of the training PCA residuals (Q) above which a candidate is `border` (common practice) | (0, 1] |
/// | `residual_outside_quantile` | 0.99 | quantile of the training Q above which a candidate is `outside` (common practice) | [`residual_border_quantile`, 1] |
/// | `leverage_factor` | 3 | the leverage warning is h* = factor·(p + 1)/n with p kept components (Gramatica, QSAR Comb. Sci. 2007) | > 0 |
///
/// Typicality is a conformal p-value, so it can never fall below
/// 1/(n + 1): with fewer than 99 training rows the default outside limit of
/// 0.01 cannot fire on typicality alone.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct DomainSettings {
    pub k: usize,
    pub variance_fraction: f64,
    pub max_components: usize,
    pub z: f64,
    pub typicality_border: f64,
    pub typicality_outside: f64,
    pub residual_border_quantile: f64,
    pub residual_outside_quantile: f64,
    pub leverage_factor: f64,
}

impl Default for DomainSettings {
    fn default() -> Self {
        DomainSettings {
            k: 5,
            variance_fraction: 0.90,
            max_components: 10,
            z: 0.5,
            typicality_border: 0.05,
            typicality_outside: 0.01,
            residual_border_quantile: 0.95,
            residual_outside_quantile: 0.99,
            leverage_factor: 3.0,
        }
    }
}

impl DomainSettings {
    /// Checks every setting against its range (see the table above); the
    /// error names the first one out of range.
    pub fn check(&self) -> Result<(), Error> {
        let bad = |name: &'static str, value: String, expected: &'static str| {
            Err(Error::Setting {
                name,
                value,
                expected,
            })
        };
        if self.k == 0 {
            return bad("domain.k", self.k.to_string(), "at least 1 neighbour");
        }
        pca::check_settings(self.variance_fraction, self.max_components).map_err(|e| match e {
            pca::Error::Setting {
                name,
                value,
                expected,
            } => Error::Setting {
                name: if name == "variance_fraction" {
                    "domain.variance_fraction"
                } else {
                    "domain.max_components"
                },
                value,
                expected,
            },
            other => Error::Pca(other),
        })?;
        if !self.z.is_finite() {
            return bad(
                "domain.z",
                self.z.to_string(),
                "a finite number (0.5 is Tropsha's)",
            );
        }
        if !(self.typicality_border > 0.0 && self.typicality_border < 1.0) {
            return bad(
                "domain.typicality_border",
                self.typicality_border.to_string(),
                "a p-value in (0, 1)",
            );
        }
        if !(self.typicality_outside > 0.0 && self.typicality_outside <= self.typicality_border) {
            return bad(
                "domain.typicality_outside",
                self.typicality_outside.to_string(),
                "a p-value in (0, typicality_border]",
            );
        }
        let q_border = self.residual_border_quantile;
        if !(q_border > 0.0 && q_border <= 1.0) {
            return bad(
                "domain.residual_border_quantile",
                q_border.to_string(),
                "a quantile in (0, 1]",
            );
        }
        let q_outside = self.residual_outside_quantile;
        if !(q_outside >= q_border && q_outside <= 1.0) {
            return bad(
                "domain.residual_outside_quantile",
                q_outside.to_string(),
                "a quantile in [residual_border_quantile, 1]",
            );
        }
        if !(self.leverage_factor.is_finite() && self.leverage_factor > 0.0) {
            return bad(
                "domain.leverage_factor",
                self.leverage_factor.to_string(),
                "a positive number (3 is Gramatica's)",
            );
        }
        Ok(())
    }
}
