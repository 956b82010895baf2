//! The verdict rules: how the measured signals of one candidate become
//! `inside`, `border` or `outside`, and the words that say why.
//! The rules themselves are documented on the `domain` module.

use super::{DomainSettings, DomainSignals, DomainThresholds, OutOfRange, Verdict};

/// What was measured for one candidate, before judgement.
pub(crate) struct Measured {
    pub knn_distance: f64,
    pub typicality: f64,
    pub leverage: f64,
    pub pca_residual: f64,
    pub out_of_range: Vec<OutOfRange>,
}

/// Applies the verdict rules. Every reason that fired is noted, the
/// outside ones first.
pub(crate) fn judge(m: Measured, t: &DomainThresholds, s: &DomainSettings) -> DomainSignals {
    let mut outside = Vec::new();
    let mut border = Vec::new();
    if m.typicality < s.typicality_outside {
        outside.push(format!(
            "typicality {} is below the outside limit {}: hardly any training point is as far \
             from its {} nearest neighbours",
            num(m.typicality),
            num(s.typicality_outside),
            s.k
        ));
    } else if m.typicality < s.typicality_border {
        border.push(format!(
            "typicality {} is below the border limit {}",
            num(m.typicality),
            num(s.typicality_border)
        ));
    }
    if t.residual_meaningful {
        if m.pca_residual > t.residual_outside_limit {
            outside.push(format!(
                "PCA residual {} is above the outside limit {} (the {} quantile of the training \
                 residuals): the candidate lies off the space the training descriptors span",
                num(m.pca_residual),
                num(t.residual_outside_limit),
                num(s.residual_outside_quantile)
            ));
        } else if m.pca_residual > t.residual_border_limit {
            border.push(format!(
                "PCA residual {} is above the border limit {} (the {} quantile of the training \
                 residuals)",
                num(m.pca_residual),
                num(t.residual_border_limit),
                num(s.residual_border_quantile)
            ));
        }
    }
    let beyond_z_threshold = m.knn_distance > t.z_threshold;
    if beyond_z_threshold {
        border.push(format!(
            "mean distance {} to the {} nearest training points is beyond the Z-rule threshold {}",
            num(m.knn_distance),
            s.k,
            num(t.z_threshold)
        ));
    }
    if t.leverage_meaningful && m.leverage > t.leverage_warning {
        border.push(format!(
            "leverage {} is above the warning level h* = {}",
            num(m.leverage),
            num(t.leverage_warning)
        ));
    }
    for r in &m.out_of_range {
        border.push(format!(
            "descriptor {} = {} is outside the training range [{}, {}]",
            r.descriptor,
            num(r.value),
            num(r.min),
            num(r.max)
        ));
    }
    let verdict = if !outside.is_empty() {
        Verdict::Outside
    } else if !border.is_empty() {
        Verdict::Border
    } else {
        Verdict::Inside
    };
    outside.extend(border);
    DomainSignals {
        knn_distance: m.knn_distance,
        typicality: m.typicality,
        beyond_z_threshold,
        leverage: m.leverage,
        pca_residual: m.pca_residual,
        out_of_range: m.out_of_range,
        verdict,
        notes: outside,
    }
}

/// The signals of a candidate with a non-finite descriptor: it cannot be
/// placed, so it is outside and every signal is NaN. Callers normally
/// reject such rows before they get here.
pub(crate) fn unplaceable() -> DomainSignals {
    DomainSignals {
        knn_distance: f64::NAN,
        typicality: f64::NAN,
        beyond_z_threshold: false,
        leverage: f64::NAN,
        pca_residual: f64::NAN,
        out_of_range: Vec::new(),
        verdict: Verdict::Outside,
        notes: vec![
            "a descriptor value is not a finite number, so the candidate cannot be placed in the \
             domain"
                .to_string(),
        ],
    }
}

/// A number for people: four significant figures, scientific notation only
/// for very small or very large magnitudes.
fn num(v: f64) -> String {
    let a = v.abs();
    if v == 0.0 || !v.is_finite() {
        return v.to_string();
    }
    if !(1e-3..1e6).contains(&a) {
        return format!("{v:.3e}");
    }
    let decimals = (3 - a.log10().floor() as i32).max(0) as usize;
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

#[cfg(test)]
mod tests {
    use super::num;

    #[test]
    fn numbers_read_with_four_significant_figures() {
        assert_eq!(num(0.012346), "0.01235");
        assert_eq!(num(3.0), "3");
        assert_eq!(num(2.34567), "2.346");
        assert_eq!(num(1234.56), "1235");
        assert_eq!(num(-0.5), "-0.5");
        assert_eq!(num(1.5e-5), "1.500e-5");
        assert_eq!(num(0.0), "0");
    }
}
