//! Hyperparameter grids: the defaults for standardised descriptors, the
//! command-line override syntax, and the simplicity order every grid keeps
//! (documented on [`Grid`]).

use std::cmp::Ordering;

use super::{Error, Family, Grid, Hyper};

/// Ridge penalties of the default grid: 10³ … 10⁻³ in 13 half-decade steps.
/// With standardised descriptors XᵀX has diagonal n, so this spans
/// penalties from far above to far below the data's own scale.
fn default_ridge_alphas() -> Vec<f64> {
    (0..13).map(|i| 10f64.powf(3.0 - 0.5 * i as f64)).collect()
}

/// Kernel widths as multiples of 1/p: for standardised descriptors the mean
/// squared distance between two rows is 2p, so γ = c/p puts typical kernel
/// values at exp(−2c). γ = 1/p is scikit-learn's default for the RBF kernel
/// (common practice).
const KERNEL_GAMMA_MULTIPLES: [f64; 4] = [0.1, 0.3, 1.0, 3.0];
const KERNEL_ALPHAS: [f64; 5] = [10.0, 1.0, 0.1, 0.01, 0.001];
const KNN_KS: [usize; 9] = [30, 20, 15, 10, 7, 5, 3, 2, 1];

/// The default grid of a family for `n_descriptors` standardised
/// descriptors, simplest first.
///
/// | name | family | default values | purpose | range |
/// | --- | --- | --- | --- | --- |
/// | `alpha` | ridge | 10³, 10^2.5, …, 10⁻³ (13) | shrinkage of the coefficients | > 0 |
/// | `gamma` | kernel ridge | {0.1, 0.3, 1, 3} / p | inverse squared kernel width | > 0 |
/// | `alpha` | kernel ridge | 10, 1, 0.1, 0.01, 0.001 | shrinkage of the dual coefficients | > 0 |
/// | `k` | k-NN | 30, 20, 15, 10, 7, 5, 3, 2, 1 | neighbours averaged (capped at n) | ≥ 1 |
pub fn default_grid(family: Family, n_descriptors: usize) -> Grid {
    let points = match family {
        Family::Ridge => default_ridge_alphas()
            .into_iter()
            .map(|alpha| Hyper::Ridge { alpha })
            .collect(),
        Family::KernelRidge => {
            let p = n_descriptors.max(1) as f64;
            KERNEL_GAMMA_MULTIPLES
                .iter()
                .flat_map(|c| {
                    KERNEL_ALPHAS.iter().map(move |&alpha| Hyper::KernelRidge {
                        gamma: c / p,
                        alpha,
                    })
                })
                .collect()
        }
        Family::Knn => KNN_KS.iter().map(|&k| Hyper::Knn { k }).collect(),
    };
    Grid { family, points }
}

/// Orders two settings of one family, simplest first (see [`Grid`]).
/// Settings of different families compare equal: callers check the family
/// first.
fn simplicity_order(a: &Hyper, b: &Hyper) -> Ordering {
    match (a, b) {
        (Hyper::Ridge { alpha: a }, Hyper::Ridge { alpha: b }) => b.total_cmp(a),
        (
            Hyper::KernelRidge {
                gamma: ga,
                alpha: aa,
            },
            Hyper::KernelRidge {
                gamma: gb,
                alpha: ab,
            },
        ) => ga.total_cmp(gb).then(ab.total_cmp(aa)),
        (Hyper::Knn { k: a }, Hyper::Knn { k: b }) => b.cmp(a),
        _ => Ordering::Equal,
    }
}

impl Hyper {
    /// Checks the values: penalties and kernel widths positive and finite,
    /// k at least 1.
    pub fn check(&self) -> Result<(), Error> {
        let positive = |parameter: &'static str, value: f64| {
            if value.is_finite() && value > 0.0 {
                Ok(())
            } else {
                Err(Error::NotPositive {
                    parameter,
                    value: value.to_string(),
                })
            }
        };
        match *self {
            Hyper::Ridge { alpha } => positive("alpha", alpha),
            Hyper::KernelRidge { gamma, alpha } => {
                positive("gamma", gamma)?;
                positive("alpha", alpha)
            }
            Hyper::Knn { k: 0 } => Err(Error::NotACount {
                value: "0".to_string(),
            }),
            Hyper::Knn { .. } => Ok(()),
        }
    }
}

impl Grid {
    /// A grid of `family` from settings in any order: each is checked, and
    /// they are sorted simplest first. An empty list, a setting of another
    /// family or a setting listed twice is an error.
    pub fn new(family: Family, mut points: Vec<Hyper>) -> Result<Grid, Error> {
        check_points(family, &points)?;
        points.sort_by(simplicity_order);
        if let Some(w) = points.windows(2).find(|w| w[0] == w[1]) {
            return Err(Error::DuplicateSetting { setting: w[0] });
        }
        Ok(Grid { family, points })
    }

    /// Checks a grid built elsewhere: non-empty, every setting valid and of
    /// the grid's family, sorted simplest first without repeats.
    pub fn check(&self) -> Result<(), Error> {
        check_points(self.family, &self.points)?;
        for (i, w) in self.points.windows(2).enumerate() {
            match simplicity_order(&w[0], &w[1]) {
                Ordering::Less => {}
                Ordering::Equal => return Err(Error::DuplicateSetting { setting: w[0] }),
                Ordering::Greater => {
                    return Err(Error::NotInSimplicityOrder {
                        index: i + 1,
                        setting: w[1],
                        previous: w[0],
                    });
                }
            }
        }
        Ok(())
    }
}

fn check_points(family: Family, points: &[Hyper]) -> Result<(), Error> {
    if points.is_empty() {
        return Err(Error::EmptyGrid {
            family: family.name(),
        });
    }
    for point in points {
        if point.family() != family {
            return Err(Error::WrongFamily {
                family: family.name(),
                setting: *point,
            });
        }
        point.check()?;
    }
    Ok(())
}

/// A valid spec of each family, for messages.
fn spec_example(family: Family) -> &'static str {
    match family {
        Family::Ridge => "alpha=100,10,1",
        Family::KernelRidge => "gamma=0.01,0.1;alpha=1,0.1",
        Family::Knn => "k=10,5,3",
    }
}

fn spec_keys(family: Family) -> &'static [&'static str] {
    match family {
        Family::Ridge => &["alpha"],
        Family::KernelRidge => &["gamma", "alpha"],
        Family::Knn => &["k"],
    }
}

/// Parses a command-line grid override: `;`-separated `name=v1,v2,…` lists,
/// e.g. `alpha=100,10,1` (ridge), `gamma=0.01,0.1;alpha=1,0.1` (kernel ridge:
/// every γ with every α), `k=10,5,3` (k-NN). Values may come in any order;
/// the grid is sorted simplest first.
pub fn parse_grid(family: Family, spec: &str) -> Result<Grid, Error> {
    let lists = parameter_lists(family, spec)?;
    let points = match family {
        Family::Ridge => positive_values("alpha", &lists[0])?
            .into_iter()
            .map(|alpha| Hyper::Ridge { alpha })
            .collect(),
        Family::KernelRidge => {
            let gammas = positive_values("gamma", &lists[0])?;
            let alphas = positive_values("alpha", &lists[1])?;
            gammas
                .iter()
                .flat_map(|&gamma| {
                    alphas
                        .iter()
                        .map(move |&alpha| Hyper::KernelRidge { gamma, alpha })
                })
                .collect()
        }
        Family::Knn => lists[0]
            .iter()
            .map(|v| match v.parse::<usize>() {
                Ok(k) if k >= 1 => Ok(Hyper::Knn { k }),
                _ => Err(Error::NotACount {
                    value: v.to_string(),
                }),
            })
            .collect::<Result<Vec<_>, _>>()?,
    };
    Grid::new(family, points)
}

/// The value lists of a spec, one per parameter of the family in
/// [`spec_keys`] order; each parameter must appear exactly once.
fn parameter_lists(family: Family, spec: &str) -> Result<Vec<Vec<&str>>, Error> {
    let keys = spec_keys(family);
    let malformed = |part: &str| Error::MalformedSpec {
        part: part.to_string(),
        example: spec_example(family),
    };
    let mut lists: Vec<Option<Vec<&str>>> = vec![None; keys.len()];
    for part in spec.split(';').map(str::trim).filter(|p| !p.is_empty()) {
        let (key, values) = part.split_once('=').ok_or_else(|| malformed(part))?;
        let key = key.trim();
        let slot = keys
            .iter()
            .position(|k| *k == key)
            .ok_or_else(|| Error::UnknownParameter {
                family: family.name(),
                parameter: key.to_string(),
                expected: keys.join(", "),
                example: spec_example(family),
            })?;
        if lists[slot].is_some() {
            return Err(Error::RepeatedParameter {
                parameter: keys[slot],
            });
        }
        let values: Vec<&str> = values.split(',').map(str::trim).collect();
        if values.iter().any(|v| v.is_empty()) {
            return Err(malformed(part));
        }
        lists[slot] = Some(values);
    }
    lists
        .into_iter()
        .zip(keys)
        .map(|(list, &parameter)| {
            list.ok_or(Error::MissingParameter {
                family: family.name(),
                parameter,
                example: spec_example(family),
            })
        })
        .collect()
}

fn positive_values(parameter: &'static str, values: &[&str]) -> Result<Vec<f64>, Error> {
    values
        .iter()
        .map(|v| match v.parse::<f64>() {
            Ok(x) if x.is_finite() && x > 0.0 => Ok(x),
            Ok(_) => Err(Error::NotPositive {
                parameter,
                value: v.to_string(),
            }),
            Err(_) => Err(Error::NotANumber {
                parameter,
                value: v.to_string(),
            }),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_grids_are_sorted_simplest_first_and_valid() {
        for family in Family::BY_SIMPLICITY {
            let grid = default_grid(family, 200);
            grid.check().unwrap();
            assert_eq!(grid, Grid::new(family, grid.points.clone()).unwrap());
        }
        let ridge = default_grid(Family::Ridge, 10);
        assert_eq!(ridge.points.len(), 13);
        assert_eq!(ridge.points[0], Hyper::Ridge { alpha: 1000.0 });
        assert_eq!(ridge.points[12], Hyper::Ridge { alpha: 1e-3 });
        let kernel = default_grid(Family::KernelRidge, 200);
        assert_eq!(kernel.points.len(), 20);
        assert_eq!(
            kernel.points[0],
            Hyper::KernelRidge {
                gamma: 0.1 / 200.0,
                alpha: 10.0
            }
        );
        assert_eq!(
            kernel.points[19],
            Hyper::KernelRidge {
                gamma: 3.0 / 200.0,
                alpha: 0.001
            }
        );
        let knn = default_grid(Family::Knn, 5);
        assert_eq!(knn.points.first(), Some(&Hyper::Knn { k: 30 }));
        assert_eq!(knn.points.last(), Some(&Hyper::Knn { k: 1 }));
    }

    #[test]
    fn parse_grid_sorts_into_simplicity_order() {
        let ridge = parse_grid(Family::Ridge, "alpha=1, 100 ,10").unwrap();
        assert_eq!(
            ridge.points,
            [
                Hyper::Ridge { alpha: 100.0 },
                Hyper::Ridge { alpha: 10.0 },
                Hyper::Ridge { alpha: 1.0 }
            ]
        );
        let kernel = parse_grid(Family::KernelRidge, "alpha=0.1,1; gamma=0.1,0.01;").unwrap();
        assert_eq!(
            kernel.points,
            [
                Hyper::KernelRidge {
                    gamma: 0.01,
                    alpha: 1.0
                },
                Hyper::KernelRidge {
                    gamma: 0.01,
                    alpha: 0.1
                },
                Hyper::KernelRidge {
                    gamma: 0.1,
                    alpha: 1.0
                },
                Hyper::KernelRidge {
                    gamma: 0.1,
                    alpha: 0.1
                },
            ]
        );
        let knn = parse_grid(Family::Knn, "k=3,10,5").unwrap();
        assert_eq!(
            knn.points,
            [
                Hyper::Knn { k: 10 },
                Hyper::Knn { k: 5 },
                Hyper::Knn { k: 3 }
            ]
        );
    }

    #[test]
    fn parse_grid_rejects_bad_specs_with_the_reason() {
        let cases: [(Family, &str, &str); 14] = [
            (Family::Ridge, "alpha=1,-2", "alpha=-2 must be a positive"),
            (Family::Ridge, "alpha=0", "alpha=0 must be a positive"),
            (Family::Ridge, "alpha=inf", "alpha=inf must be a positive"),
            (Family::Ridge, "alpha=NaN", "alpha=NaN must be a positive"),
            (Family::Ridge, "alpha=one", "alpha=one is not a number"),
            (Family::Ridge, "alpha=1,,2", "expected name=v1,v2"),
            (Family::Ridge, "alpha", "expected name=v1,v2"),
            (Family::Ridge, "", "needs alpha="),
            (Family::Ridge, "alpha=1;alpha=2", "alpha is given twice"),
            (Family::Ridge, "alpha=1,1", "listed twice"),
            (Family::KernelRidge, "gamma=0.1", "needs alpha="),
            (
                Family::KernelRidge,
                "gamma=0;alpha=1",
                "gamma=0 must be a positive",
            ),
            (Family::Knn, "k=2.5", "k=2.5 must be a whole number"),
            (Family::Knn, "k=0", "k=0 must be a whole number"),
        ];
        for (family, spec, expected) in cases {
            let message = parse_grid(family, spec).unwrap_err().to_string();
            assert!(message.contains(expected), "{spec:?}: {message}");
        }
        let unknown = parse_grid(Family::Knn, "alpha=1").unwrap_err().to_string();
        assert!(
            unknown.contains("'alpha'") && unknown.contains("k=10,5,3"),
            "{unknown}"
        );
    }

    #[test]
    fn check_rejects_unsorted_mixed_and_invalid_grids() {
        let unsorted = Grid {
            family: Family::Ridge,
            points: vec![Hyper::Ridge { alpha: 1.0 }, Hyper::Ridge { alpha: 10.0 }],
        };
        assert!(matches!(
            unsorted.check(),
            Err(Error::NotInSimplicityOrder { index: 1, .. })
        ));
        let mixed = Grid {
            family: Family::Ridge,
            points: vec![Hyper::Knn { k: 3 }],
        };
        assert!(matches!(mixed.check(), Err(Error::WrongFamily { .. })));
        let empty = Grid {
            family: Family::Knn,
            points: vec![],
        };
        assert!(matches!(empty.check(), Err(Error::EmptyGrid { .. })));
        let bad = Grid {
            family: Family::KernelRidge,
            points: vec![Hyper::KernelRidge {
                gamma: f64::NAN,
                alpha: 1.0,
            }],
        };
        assert!(matches!(
            bad.check(),
            Err(Error::NotPositive {
                parameter: "gamma",
                ..
            })
        ));
    }
}
