//! `plumbline bundle inspect|verify`.

use std::fmt::Write as _;

use super::BundleCommand;
use crate::bundle::{self, Bundle};

pub fn run(command: &BundleCommand) -> anyhow::Result<()> {
    match command {
        BundleCommand::Inspect { file, json } => {
            let b = bundle::read(file)?;
            if *json {
                println!("{}", serde_json::to_string_pretty(&inspect_json(&b))?);
            } else {
                print!("{}", model_card(&b));
            }
            Ok(())
        }
        BundleCommand::Verify { file } => {
            let b = bundle::read(file)?;
            println!(
                "ok: {} version {} ({} descriptors, {} training rows, checksum and shapes verified)",
                b.model.info.id,
                b.model.info.version,
                b.model.n_descriptors(),
                b.manifest.card.training_rows
            );
            Ok(())
        }
    }
}

/// The machine-readable card: the manifest without the training ids.
pub fn inspect_json(b: &Bundle) -> serde_json::Value {
    serde_json::json!({
        "model": b.model.info,
        "card": b.manifest.card,
    })
}

/// The model card for people.
pub fn model_card(b: &Bundle) -> String {
    let info = &b.model.info;
    let card = &b.manifest.card;
    let mut s = String::new();
    let _ = writeln!(s, "model       {}  (version {})", info.id, info.version);
    let unit = if info.unit.is_empty() {
        String::new()
    } else {
        format!(" [{}]", info.unit)
    };
    let dir = match info.direction {
        crate::scoring::Direction::Higher => "higher is better",
        crate::scoring::Direction::Lower => "lower is better",
    };
    let _ = writeln!(s, "endpoint    {}{unit}, {dir}", info.endpoint);
    let _ = writeln!(
        s,
        "family      {}  {}",
        card.family,
        hyper_text(&info.hyper)
    );
    let _ = writeln!(
        s,
        "training    {} rows × {} descriptors (data sha256 {}…), seed {}",
        card.training_rows,
        info.descriptor_names.len(),
        &card.data_sha256[..card.data_sha256.len().min(16)],
        card.seed
    );
    if !card.dropped_constant.is_empty() {
        let _ = writeln!(
            s,
            "dropped     constant descriptors: {}",
            card.dropped_constant.join(", ")
        );
    }
    let _ = writeln!(
        s,
        "validation  nested CV, {} outer × {} inner folds, split {}",
        card.folds, card.inner_folds, card.split
    );
    let _ = writeln!(
        s,
        "\nclaims (outer folds, mean ± SE)      chosen split      random split"
    );
    for ((name, c), (_, r)) in card
        .claims
        .as_map()
        .iter()
        .zip(card.random_split.as_map().iter())
    {
        let _ = writeln!(
            s,
            "  {name:<10} {:>24} {:>17}",
            format!("{:.3} ± {:.3}", c.mean, c.se),
            format!("{:.3} ± {:.3}", r.mean, r.se)
        );
    }
    let y = &card.y_randomization;
    let _ = writeln!(
        s,
        "\ny-randomisation  {} permutations, real q² {:.3}, p = {:.3}",
        y.permutations, y.real_q2, y.p_value
    );
    let d = &card.domain;
    let _ = writeln!(s, "\napplicability domain");
    let _ = writeln!(
        s,
        "  PCA             {} components, {:.1}% of variance",
        d.components,
        100.0 * d.explained_variance
    );
    let _ = writeln!(
        s,
        "  k-NN distance   k = {}, Z-rule threshold {:.3} (Z = {})",
        d.k, d.z_threshold, d.z
    );
    let _ = writeln!(
        s,
        "  typicality      border < {}, outside < {}",
        d.typicality_border, d.typicality_outside
    );
    let lev = if d.leverage_meaningful {
        format!("{:.3}", d.leverage_warning)
    } else {
        format!("{:.3} (≥ 1: not used)", d.leverage_warning)
    };
    let _ = writeln!(s, "  leverage h*     {lev}");
    let _ = writeln!(
        s,
        "  PCA residual    border > {:.3}, outside > {:.3}",
        d.residual_border_limit, d.residual_outside_limit
    );
    let counts: Vec<String> = d
        .oof_verdict_counts
        .iter()
        .map(|(k, v)| format!("{k} {v}"))
        .collect();
    let _ = writeln!(s, "  out-of-fold     {}", counts.join(", "));
    let bands: Vec<String> = card
        .conformal_bands
        .iter()
        .map(|b| {
            format!(
                "{} {}{}",
                b.verdict,
                b.n,
                if b.used { "" } else { " (pooled)" }
            )
        })
        .collect();
    let _ = writeln!(
        s,
        "\nintervals   {}, default confidence {}, bands: {}",
        card.conformal_method,
        info.default_confidence,
        bands.join(", ")
    );
    let _ = writeln!(
        s,
        "created     {} by plumbline {}",
        card.created_at, card.tool_version
    );
    let _ = writeln!(s, "\ncautions");
    for caution in &card.cautions {
        let _ = writeln!(s, "  - {caution}");
    }
    s
}

pub fn hyper_text(h: &crate::models::Hyper) -> String {
    use crate::models::Hyper;
    match h {
        Hyper::Ridge { alpha } => format!("alpha = {alpha}"),
        Hyper::KernelRidge { gamma, alpha } => format!("gamma = {gamma}, alpha = {alpha}"),
        Hyper::Knn { k } => format!("k = {k}"),
    }
}
