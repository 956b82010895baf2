//! The invented lead-optimisation programme behind the demo: four known
//! chemical series against a made-up enzyme, tessellase, a next round of
//! candidates from them, and one new series from an unexplored part of
//! descriptor space whose real behaviour the training data cannot reveal.
//!
//! Nothing here describes a real target, compound or assay. Descriptor
//! kinds and value ranges imitate the usual ones (heavy-atom counts, H-bond
//! donors and acceptors, rotatable bonds, rings, a logP-like lipophilicity,
//! a polar-surface-like polarity, the sp³ fraction, fingerprint bits), and
//! activity is on a pIC50-like scale where higher is better.

use super::draw::Draw;

/// Descriptor columns, in file order, with the decimals each is written
/// with (0 for counts and bits).
pub const DESCRIPTORS: [(&str, usize); 25] = [
    ("heavy_atoms", 0),
    ("hbond_donors", 0),
    ("hbond_acceptors", 0),
    ("rotatable_bonds", 0),
    ("rings", 0),
    ("aromatic_rings", 0),
    ("logp", 2),
    ("tpsa", 1),
    ("fsp3", 2),
    ("fp_00", 0),
    ("fp_01", 0),
    ("fp_02", 0),
    ("fp_03", 0),
    ("fp_04", 0),
    ("fp_05", 0),
    ("fp_06", 0),
    ("fp_07", 0),
    ("fp_08", 0),
    ("fp_09", 0),
    ("fp_10", 0),
    ("fp_11", 0),
    ("fp_12", 0),
    ("fp_13", 0),
    ("fp_14", 0),
    ("fp_15", 0),
];

/// Where the bits start among the descriptors.
const FIRST_BIT: usize = 9;

/// A chemical series: the centre of its descriptor distribution and how
/// often each fingerprint bit is set in it.
struct Series {
    name: &'static str,
    /// Compound-id prefix.
    code: &'static str,
    training: usize,
    next_round: usize,
    heavy_atoms: f64,
    hbond_donors: f64,
    acceptor_shift: f64,
    rotor_shift: f64,
    aromatic_share: f64,
    logp: f64,
    tpsa_shift: f64,
    fsp3: f64,
    bits: [f64; 16],
    /// An effect on activity that no descriptor carries: zero for the known
    /// series, strongly negative for the new one (its scaffold cannot make
    /// the contacts the others make, in the story).
    hidden_effect: f64,
}

/// The known series, then the new one.
const SERIES: [Series; 5] = [
    Series {
        name: "azurite",
        code: "AZ",
        training: 90,
        next_round: 25,
        heavy_atoms: 27.0,
        hbond_donors: 1.2,
        acceptor_shift: 0.0,
        rotor_shift: 0.0,
        aromatic_share: 0.75,
        logp: 3.6,
        tpsa_shift: 0.0,
        fsp3: 0.22,
        bits: [
            0.85, 0.70, 0.30, 0.60, 0.20, 0.25, 0.10, 0.55, 0.40, 0.15, 0.30, 0.10, 0.04, 0.03,
            0.05, 0.02,
        ],
        hidden_effect: 0.0,
    },
    Series {
        name: "basalt",
        code: "BS",
        training: 80,
        next_round: 25,
        heavy_atoms: 31.0,
        hbond_donors: 0.8,
        acceptor_shift: -0.5,
        rotor_shift: 1.0,
        aromatic_share: 0.85,
        logp: 4.3,
        tpsa_shift: -6.0,
        fsp3: 0.16,
        bits: [
            0.60, 0.20, 0.80, 0.35, 0.50, 0.45, 0.20, 0.40, 0.10, 0.60, 0.25, 0.30, 0.03, 0.05,
            0.02, 0.04,
        ],
        hidden_effect: 0.0,
    },
    Series {
        name: "cinnabar",
        code: "CN",
        training: 80,
        next_round: 25,
        heavy_atoms: 24.0,
        hbond_donors: 2.1,
        acceptor_shift: 0.8,
        rotor_shift: -0.5,
        aromatic_share: 0.55,
        logp: 2.3,
        tpsa_shift: 8.0,
        fsp3: 0.34,
        bits: [
            0.20, 0.55, 0.40, 0.70, 0.70, 0.15, 0.60, 0.65, 0.30, 0.20, 0.70, 0.15, 0.05, 0.02,
            0.03, 0.06,
        ],
        hidden_effect: 0.0,
    },
    Series {
        name: "dolomite",
        code: "DL",
        training: 70,
        next_round: 25,
        heavy_atoms: 34.0,
        hbond_donors: 1.5,
        acceptor_shift: 0.3,
        rotor_shift: 0.5,
        aromatic_share: 0.65,
        logp: 3.0,
        tpsa_shift: 2.0,
        fsp3: 0.28,
        bits: [
            0.40, 0.85, 0.15, 0.50, 0.30, 0.55, 0.35, 0.30, 0.75, 0.40, 0.10, 0.60, 0.02, 0.04,
            0.06, 0.03,
        ],
        hidden_effect: 0.0,
    },
    Series {
        name: NEW_SERIES,
        code: "OB",
        training: 0,
        next_round: 20,
        heavy_atoms: 40.0,
        hbond_donors: 1.0,
        acceptor_shift: 0.5,
        rotor_shift: 3.0,
        aromatic_share: 0.2,
        logp: 3.2,
        tpsa_shift: 0.0,
        fsp3: 0.68,
        // The cooperative pair fp_03 + fp_07 is nearly always present, so a
        // model that learned the known series' SAR expects high activity;
        // bits 12–15, rare elsewhere, mark the new scaffold.
        bits: [
            0.10, 0.10, 0.05, 0.90, 0.05, 0.10, 0.05, 0.90, 0.10, 0.05, 0.10, 0.05, 0.85, 0.80,
            0.90, 0.75,
        ],
        hidden_effect: -2.4,
    },
];

/// The new, unexplored series of the next round.
pub const NEW_SERIES: &str = "obsidian";

/// Names of the known series, in file order.
pub fn known_series() -> Vec<&'static str> {
    SERIES
        .iter()
        .filter(|s| s.training > 0)
        .map(|s| s.name)
        .collect()
}

/// One compound: its descriptors as written (already rounded) and its
/// true activity before assay noise.
pub struct Compound {
    pub id: String,
    pub series: &'static str,
    pub descriptors: [f64; 25],
    pub true_activity: f64,
}

/// The lipophilicity optimum of the structure–activity relationship.
const LOGP_OPTIMUM: f64 = 3.3;

/// Assay noise, in log units (a typical repeatability of potency assays,
/// from memory).
pub const ASSAY_NOISE: f64 = 0.3;

/// The invented structure–activity relationship: a lipophilicity optimum,
/// a size gain that turns into a penalty for large compounds, a cooperative
/// pair of bits, a bit combination that hurts, and penalties for many
/// donors and a large polar surface.
fn sar(d: &[f64; 25], hidden_effect: f64) -> f64 {
    let (heavy, donors, logp, tpsa) = (d[0], d[1], d[6], d[7]);
    let bit = |b: usize| d[FIRST_BIT + b] > 0.5;
    let oversize = (heavy - 34.0).max(0.0);
    6.8 - 0.35 * (logp - LOGP_OPTIMUM) * (logp - LOGP_OPTIMUM) + 0.05 * (heavy - 28.0)
        - 0.012 * oversize * oversize
        + if bit(3) && bit(7) { 0.8 } else { 0.0 }
        - if bit(5) && !bit(1) { 0.6 } else { 0.0 }
        - 0.25 * (donors - 2.0).max(0.0)
        - 0.01 * (tpsa - 100.0).max(0.0)
        + hidden_effect
}

/// Rounds to the decimals the file shows, so the activity is a function of
/// the descriptors exactly as written.
fn as_written(v: f64, decimals: usize) -> f64 {
    format!("{v:.decimals$}").parse().unwrap_or(v)
}

fn clamp_round(v: f64, lo: f64, hi: f64) -> f64 {
    v.round().clamp(lo, hi)
}

/// Draws one compound of `series`. `optimised` moves the centre halfway
/// to the lipophilicity optimum and favours the cooperative bits, as a
/// team that learned from the first rounds would.
fn compound(draw: &mut Draw, s: &Series, id: String, optimised: bool) -> Compound {
    let mut d = [0.0; 25];
    let heavy = clamp_round(draw.gauss(s.heavy_atoms, 3.0), 12.0, 60.0);
    let rings = clamp_round(heavy / 8.5 + draw.gauss(0.0, 0.6), 1.0, 7.0);
    let aromatic = clamp_round(rings * s.aromatic_share + draw.gauss(0.0, 0.5), 0.0, rings);
    let acceptors = clamp_round(
        heavy / 6.5 + s.acceptor_shift + draw.gauss(0.0, 1.0),
        1.0,
        14.0,
    );
    let donors = clamp_round(draw.gauss(s.hbond_donors, 0.8), 0.0, 6.0);
    let rotors = clamp_round(
        heavy / 5.0 - rings + s.rotor_shift + draw.gauss(0.0, 1.2),
        0.0,
        16.0,
    );
    let centre = if optimised {
        (s.logp + LOGP_OPTIMUM) / 2.0
    } else {
        s.logp
    };
    let logp = draw.gauss(
        centre + 0.05 * (heavy - s.heavy_atoms) - 0.35 * (donors - s.hbond_donors),
        0.55,
    );
    let tpsa = (9.5 * acceptors + 11.0 * donors + draw.gauss(s.tpsa_shift, 7.0)).max(5.0);
    let fsp3 = draw.gauss(s.fsp3, 0.07).clamp(0.0, 1.0);
    let values = [
        heavy, donors, acceptors, rotors, rings, aromatic, logp, tpsa, fsp3,
    ];
    for (j, v) in values.iter().enumerate() {
        d[j] = as_written(*v, DESCRIPTORS[j].1);
    }
    for (b, &p) in s.bits.iter().enumerate() {
        let p = if optimised && (b == 3 || b == 7) {
            (p + 1.0) / 2.0
        } else {
            p
        };
        d[FIRST_BIT + b] = if draw.bernoulli(p) { 1.0 } else { 0.0 };
    }
    Compound {
        id,
        series: s.name,
        true_activity: sar(&d, s.hidden_effect),
        descriptors: d,
    }
}

/// A measured activity: the truth plus assay noise, on the written scale,
/// kept inside a plausible assay window.
pub fn measure(draw: &mut Draw, c: &Compound) -> f64 {
    as_written(draw.gauss(c.true_activity, ASSAY_NOISE).clamp(3.5, 10.0), 2)
}

/// The programme so far: training compounds (series by series), and the
/// next round (shuffled, as a batch arrives).
pub struct Programme {
    pub training: Vec<(Compound, f64)>,
    pub next_round: Vec<Compound>,
    /// Lab results of the next round, in next-round order.
    pub lab_results: Vec<f64>,
}

/// Generates the whole programme from one seed. The draw order is fixed:
/// training series by series, next round series by series, the shuffle,
/// then the lab's noise.
pub fn programme(seed: u64) -> Programme {
    let mut draw = Draw::new(seed);
    let mut training = Vec::new();
    for s in &SERIES {
        for i in 1..=s.training {
            let c = compound(&mut draw, s, format!("{}-{i:04}", s.code), false);
            let a = measure(&mut draw, &c);
            training.push((c, a));
        }
    }
    let mut next_round = Vec::new();
    for s in &SERIES {
        for i in 1..=s.next_round {
            let id = format!("{}-{:04}", s.code, s.training + i);
            next_round.push(compound(&mut draw, s, id, s.training > 0));
        }
    }
    draw.shuffle(&mut next_round);
    let lab_results = next_round.iter().map(|c| measure(&mut draw, c)).collect();
    Programme {
        training,
        next_round,
        lab_results,
    }
}
