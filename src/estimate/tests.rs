//! Tests of the estimation module: variances against the full covariance, the one-pass route
//! against the usual estimator, panels of the inverse factor.

use super::*;
use crate::data::Equation;
use ndarray::{s, ShapeBuilder};

/// Deterministic regressors and correlated errors (no random crate): N equations with a
/// constant and k - 1 trigonometric regressors; `shared` gives every equation the same X.
fn system(n: usize, t: usize, k: usize, shared: bool) -> (Vec<Array1<f64>>, Vec<Array2<f64>>) {
    let xs: Vec<Array2<f64>> = (0..n)
        .map(|i| {
            let shift = if shared { 0.0 } else { i as f64 };
            Array2::from_shape_fn((t, k), |(r, j)| {
                if j == 0 {
                    1.0
                } else {
                    ((r * (j + 2)) as f64 * 0.37 + shift * 1.3 + j as f64).sin() * (1.0 + j as f64)
                }
            })
        })
        .collect();
    let ys = (0..n)
        .map(|i| {
            Array1::from_shape_fn(t, |r| {
                let common = (r as f64 * 1.7).sin();
                let own = ((r * (i + 3)) as f64 * 0.91 + i as f64).cos();
                xs[i].row(r).sum() + (1.0 + 0.2 * i as f64) * (0.8 * common + 0.6 * own)
            })
        })
        .collect();
    (ys, xs)
}

#[test]
fn variances_are_the_diagonal_of_the_full_covariance() {
    // n = 100, k = 3: K = 300 spans two panels of L^-1
    for (n, shared) in [(4, false), (30, false), (100, false), (3, true)] {
        let (ys, xs) = system(n, 120, 3, shared);
        let data = SystemData::new(
            ys.iter()
                .zip(&xs)
                .enumerate()
                .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
                .collect(),
        );
        let p = Prepared::new(&data).unwrap();
        for method in [Method::Ols, Method::Fgls, Method::IteratedFgls] {
            let est = p
                .estimate(&FitOptions {
                    method,
                    ..Default::default()
                })
                .unwrap();
            for kind in [CovKind::Classical, CovKind::Hc0, CovKind::Hc1] {
                let full = p.coef_covariance_of(&est, kind, Some(&data)).unwrap();
                let var = p.coef_variances(&est, kind, Some(&data)).unwrap();
                let se = p.coef_standard_errors(&est, kind, Some(&data)).unwrap();
                for j in 0..var.len() {
                    let d = full[[j, j]];
                    assert!(d > 0.0);
                    assert!(
                        (var[j] - d).abs() <= 1e-13 * d,
                        "{method:?} {kind:?} n={n}: {} vs {d}",
                        var[j]
                    );
                    assert!((se[j] * se[j] - d).abs() <= 1e-13 * d);
                }
            }
        }
    }
}

/// Largest |a - b| over the largest |b|.
fn rel(a: &[f64], b: &[f64]) -> f64 {
    let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
        / scale
}

#[test]
fn two_step_fgls_from_the_data_is_the_usual_estimator() {
    // The same estimator by two routes (Gram matrix, or one pass over the basis): they differ
    // only in the order of the sums, so they agree to rounding (common practice: a few
    // hundred eps on conditioned data).
    for (n, t, k, ragged) in [
        (5, 60, 3, true),
        (12, 150, 4, true),
        (40, 100, 2, false),
        (2, 30, 5, true),
    ] {
        let (ys, xs) = system(n, t, k, false);
        let xs: Vec<Array2<f64>> = xs
            .iter()
            .enumerate()
            .map(|(i, x)| {
                x.slice(s![.., ..if ragged { 1 + (i % k) } else { k }])
                    .to_owned()
            })
            .collect();
        let data = SystemData::new(
            ys.iter()
                .zip(&xs)
                .enumerate()
                .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
                .collect(),
        );
        let full = Prepared::new(&data).unwrap();
        for divisor in [Divisor::Ml, Divisor::Dof] {
            let usual = full
                .estimate(&FitOptions {
                    method: Method::Fgls,
                    divisor,
                    ..Default::default()
                })
                .unwrap();
            let (lite, fused) = fgls_from_data(&data, divisor, &|| false).unwrap();
            assert!(matches!(lite.cross, CrossProducts::ResidualsOnly { .. }));
            let tag = format!("n={n} t={t} {divisor:?}");
            assert!(
                rel(
                    fused.coef.as_slice().unwrap(),
                    usual.coef.as_slice().unwrap()
                ) < 1e-11,
                "coef {tag}"
            );
            assert!(
                rel(
                    fused.omega.as_slice_memory_order().unwrap(),
                    usual.omega.as_slice_memory_order().unwrap()
                ) < 1e-12,
                "omega {tag}"
            );
            // S is formed on first use from the residuals the fit kept: a copy taken before
            // that forms the same S, and both are the definition e_i'e_j, e_i = y_i - X_i b_i
            let copy = fused.clone();
            let mut e = Array2::<f64>::zeros((t, n));
            let mut at = 0;
            for (i, (y, x)) in ys.iter().zip(&xs).enumerate() {
                let b = fused.coef.slice(s![at..at + x.ncols()]);
                e.column_mut(i).assign(&(y - &x.dot(&b)));
                at += x.ncols();
            }
            let direct = e.t().dot(&e);
            assert!(
                rel(
                    fused
                        .resid_crossprod()
                        .as_standard_layout()
                        .as_slice()
                        .unwrap(),
                    direct.as_slice().unwrap()
                ) < 1e-10,
                "S {tag}"
            );
            assert_eq!(copy.resid_crossprod(), fused.resid_crossprod());
            let (sf, su) = (
                fused.resid_crossprod().as_standard_layout().to_owned(),
                usual.resid_crossprod().as_standard_layout().to_owned(),
            );
            assert!(
                rel(sf.as_slice().unwrap(), su.as_slice().unwrap()) < 1e-11,
                "S {tag}"
            );
            assert_eq!(
                (fused.n_iter, fused.converged, fused.method),
                (1, true, Method::Fgls)
            );
            assert!((fused.omega_cond - usual.omega_cond).abs() <= 1e-8 * usual.omega_cond);
            for kind in [CovKind::Classical, CovKind::Hc0] {
                let a = lite.coef_covariance_of(&fused, kind, Some(&data)).unwrap();
                let b = full.coef_covariance_of(&usual, kind, Some(&data)).unwrap();
                assert!(
                    rel(
                        a.as_standard_layout().as_slice().unwrap(),
                        b.as_standard_layout().as_slice().unwrap()
                    ) < 1e-10,
                    "{kind:?} {tag}"
                );
                let se = lite
                    .coef_standard_errors(&fused, kind, Some(&data))
                    .unwrap();
                let se_u = full
                    .coef_standard_errors(&usual, kind, Some(&data))
                    .unwrap();
                assert!(rel(se.as_slice().unwrap(), se_u.as_slice().unwrap()) < 1e-10);
            }
            // what the light preparation still does: OLS and the OLS residual cross-products
            let ols = lite
                .estimate(&FitOptions {
                    method: Method::Ols,
                    ..Default::default()
                })
                .unwrap();
            let ols_u = full
                .estimate(&FitOptions {
                    method: Method::Ols,
                    ..Default::default()
                })
                .unwrap();
            assert_eq!(ols.coef, ols_u.coef);
            let (a, b) = (lite.ols_crossprod(), full.ols_crossprod());
            assert!(rel(a.as_slice().unwrap(), b.as_slice().unwrap()) < 1e-12);
            let se = lite
                .coef_standard_errors(&ols, CovKind::Classical, None)
                .unwrap();
            assert!(
                rel(
                    se.as_slice().unwrap(),
                    full.coef_standard_errors(&ols_u, CovKind::Classical, None)
                        .unwrap()
                        .as_slice()
                        .unwrap()
                ) < 1e-13
            );
            // and what it refuses, with a typed error rather than a wrong number
            for method in [Method::Fgls, Method::IteratedFgls] {
                let err = lite
                    .estimate(&FitOptions {
                        method,
                        ..Default::default()
                    })
                    .unwrap_err();
                assert!(
                    matches!(err, SurError::InvalidOption(ref m) if m.contains("prepare the system again")),
                    "{err}"
                );
            }
            assert!(matches!(
                lite.coef_covariance_of(&ols, CovKind::Classical, None),
                Err(SurError::InvalidOption(_))
            ));
        }
    }
    // shared regressors and Ledoit-Wolf take the usual route
    let (ys, xs) = system(3, 40, 3, true);
    let data = SystemData::new(
        ys.iter()
            .zip(&xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    );
    let (p, _) = fgls_from_data(&data, Divisor::Ml, &|| false).unwrap();
    assert!(matches!(p.cross, CrossProducts::SharedRegressors { .. }));
}

#[test]
fn two_step_fgls_from_the_data_names_a_singular_omega_and_stops_when_asked() {
    // equation 2 is equation 0 plus equation 1 with the same regressors: residuals that add
    // up, so Omega is singular (the budget-share case)
    let (ys, xs) = system(3, 50, 3, false);
    let mut ys = ys;
    let xs = vec![xs[0].clone(), xs[0].clone(), xs[1].clone()];
    ys[1] = &ys[0] * 2.0 + xs[0].column(1).mapv(|v| v * 0.1);
    let data = SystemData::new(
        ys.iter()
            .zip(&xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    );
    let err = fgls_from_data(&data, Divisor::Ml, &|| false).unwrap_err();
    let usual = Prepared::new(&data)
        .unwrap()
        .estimate(&FitOptions::default())
        .unwrap_err();
    // the same diagnosis by both routes (the eigenvalue ratio in the message is at rounding
    // level, formed from differently summed cross-products: 0 by one, 1e-16 by the other)
    match (&err, &usual) {
        (
            SurError::SingularOmega {
                equations: a,
                detail: da,
            },
            SurError::SingularOmega {
                equations: b,
                detail: db,
            },
        ) => {
            assert_eq!(a, b);
            let tail = |d: &str| d.split_once("):").map(|(_, t)| t.to_string());
            assert_eq!(tail(da), tail(db));
            assert!(da.contains("linearly dependent"), "{da}");
        }
        _ => panic!("expected singular Omega from both routes: {err} / {usual}"),
    }
    let (ys, xs) = system(4, 50, 3, false);
    let data = SystemData::new(
        ys.iter()
            .zip(&xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    );
    assert!(matches!(
        fgls_from_data(&data, Divisor::Ml, &|| true),
        Err(SurError::Interrupted)
    ));
}

#[test]
fn panels_of_the_inverse_factor_solve_the_triangular_system() {
    // definition of the panel: L[c.., c..] X = I[c.., c..d], against the plain identity
    for n in [7usize, 64, 101] {
        let l = Array2::from_shape_fn((n, n).f(), |(i, j)| {
            if i < j {
                0.0
            } else if i == j {
                1.0 + (i % 5) as f64
            } else {
                ((i * 7 + j * 3) as f64 * 0.61).sin()
            }
        });
        for (c, d) in [(0, n), (0, 1), (n / 3, n / 2 + 1), (n - 1, n), (n, n)] {
            let x = crate::kernels::inverse_columns(&l, c, d).unwrap();
            assert_eq!(x.dim(), (n - c, d - c));
            let lx = l.slice(s![c.., c..]).dot(&x);
            for ((i, j), v) in lx.indexed_iter() {
                let want = if i == j { 1.0 } else { 0.0 };
                assert!(
                    (v - want).abs() < 1e-12,
                    "n {n} c {c} d {d}: (L X)[{i},{j}] = {v}"
                );
            }
        }
    }
    let mut zero = Array2::<f64>::eye(5).reversed_axes(); // column-major, as the factors are
    zero[[2, 2]] = 0.0;
    assert!(crate::kernels::inverse_columns(&zero, 0, 5).is_err());
}
