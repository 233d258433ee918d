//! Unit tests of the core against the dense textbook formulas (built here with plain ndarray
//! and plain loops, never through the blockwise code or the backend) and against theorems of
//! the field.

use approx::assert_relative_eq;
use ndarray::{s, Array1, Array2};

use crate::{Divisor, Equation, Estimation, FitOptions, Method, Prepared, SurError, SystemData};

/// The inverse of a square matrix by Gauss-Jordan elimination with partial pivoting: the
/// textbook reference of these tests (independent of the backend).
trait Inverse {
    fn inv(&self) -> Result<Array2<f64>, &'static str>;
}

impl Inverse for Array2<f64> {
    fn inv(&self) -> Result<Array2<f64>, &'static str> {
        let n = self.nrows();
        let mut a = self.to_owned();
        let mut b = Array2::<f64>::eye(n);
        for c in 0..n {
            let piv = (c..n)
                .max_by(|&i, &j| a[[i, c]].abs().total_cmp(&a[[j, c]].abs()))
                .ok_or("empty")?;
            if a[[piv, c]] == 0.0 {
                return Err("singular");
            }
            for j in 0..n {
                a.swap([c, j], [piv, j]);
                b.swap([c, j], [piv, j]);
            }
            let d = a[[c, c]];
            for j in 0..n {
                a[[c, j]] /= d;
                b[[c, j]] /= d;
            }
            for i in 0..n {
                if i != c && a[[i, c]] != 0.0 {
                    let f = a[[i, c]];
                    for j in 0..n {
                        a[[i, j]] -= f * a[[c, j]];
                        b[[i, j]] -= f * b[[c, j]];
                    }
                }
            }
        }
        Ok(b)
    }
}

/// The lower Cholesky factor by the textbook loops (Cholesky-Banachiewicz), or None.
fn textbook_cholesky(a: &Array2<f64>) -> Option<Array2<f64>> {
    let n = a.nrows();
    let mut l = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        for j in 0..=i {
            let s: f64 = (0..j).map(|k| l[[i, k]] * l[[j, k]]).sum();
            if i == j {
                let d = a[[i, i]] - s;
                if d <= 0.0 {
                    return None;
                }
                l[[i, i]] = d.sqrt();
            } else {
                l[[i, j]] = (a[[i, j]] - s) / l[[j, j]];
            }
        }
    }
    Some(l)
}

/// A small deterministic pseudo-random generator (xorshift), so the tests need no extra crate.
struct Rng(u64);
impl Rng {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform().max(1e-300), self.uniform());
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    }
}

/// N equations with K_i regressors (constant first) and errors correlated 0.6 across equations.
fn system(ks: &[usize], t: usize, seed: u64) -> (Vec<Array1<f64>>, Vec<Array2<f64>>) {
    let mut rng = Rng(seed);
    let n = ks.len();
    let common: Vec<f64> = (0..t).map(|_| rng.normal()).collect();
    let mut ys = Vec::new();
    let mut xs = Vec::new();
    for i in 0..n {
        let x = Array2::from_shape_fn((t, ks[i]), |(_, j)| if j == 0 { 1.0 } else { 0.0 });
        let mut x = x;
        for r in 0..t {
            for j in 1..ks[i] {
                x[[r, j]] = rng.normal() * (1.0 + j as f64);
            }
        }
        let beta: Array1<f64> = (0..ks[i])
            .map(|j| 1.0 + 0.5 * j as f64 - 0.3 * i as f64)
            .collect();
        let e: Array1<f64> = (0..t)
            .map(|r| (1.0 + 0.3 * i as f64) * (0.77 * common[r] + 0.64 * rng.normal()))
            .collect();
        ys.push(x.dot(&beta) + e);
        xs.push(x);
    }
    (ys, xs)
}

fn data<'a>(ys: &'a [Array1<f64>], xs: &'a [Array2<f64>]) -> SystemData<'a> {
    SystemData::new(
        ys.iter()
            .zip(xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    )
}

/// Dense GLS: b = (X' (Omega^-1 (x) I) X)^-1 X' (Omega^-1 (x) I) y with block-diagonal X.
fn dense_gls(
    ys: &[Array1<f64>],
    xs: &[Array2<f64>],
    omega: &Array2<f64>,
) -> (Array1<f64>, Array2<f64>) {
    let n = ys.len();
    let t = ys[0].len();
    let k: usize = xs.iter().map(|x| x.ncols()).sum();
    let mut xb = Array2::<f64>::zeros((n * t, k));
    let mut yb = Array1::<f64>::zeros(n * t);
    let mut off = 0;
    for i in 0..n {
        xb.slice_mut(s![i * t..(i + 1) * t, off..off + xs[i].ncols()])
            .assign(&xs[i]);
        yb.slice_mut(s![i * t..(i + 1) * t]).assign(&ys[i]);
        off += xs[i].ncols();
    }
    let oinv = omega.inv().unwrap();
    let mut sinv = Array2::<f64>::zeros((n * t, n * t));
    for i in 0..n {
        for j in 0..n {
            for r in 0..t {
                sinv[[i * t + r, j * t + r]] = oinv[[i, j]];
            }
        }
    }
    let a = xb.t().dot(&sinv).dot(&xb);
    let cov = a.inv().unwrap();
    let b = cov.dot(&xb.t().dot(&sinv).dot(&yb));
    (b, cov)
}

fn ols(y: &Array1<f64>, x: &Array2<f64>) -> Array1<f64> {
    let xtx = x.t().dot(x);
    xtx.inv().unwrap().dot(&x.t().dot(y))
}

fn opts(method: Method, divisor: Divisor) -> FitOptions {
    FitOptions {
        method,
        divisor,
        tol: 1e-12,
        max_iter: 500,
        ..Default::default()
    }
}

#[test]
fn ols_matches_normal_equations() {
    let (ys, xs) = system(&[3, 2, 4], 40, 7);
    let prep = Prepared::new(&data(&ys, &xs)).unwrap();
    let est = prep.estimate(&opts(Method::Ols, Divisor::Ml)).unwrap();
    let mut off = 0;
    for i in 0..3 {
        let b = ols(&ys[i], &xs[i]);
        let k = b.len();
        for j in 0..k {
            assert_relative_eq!(est.coef[off + j], b[j], max_relative = 1e-10);
        }
        off += k;
    }
    assert_eq!(est.n_iter, 0);
}

#[test]
fn fgls_matches_dense_textbook_formula_both_divisors() {
    let (ys, xs) = system(&[3, 2, 4], 30, 11);
    let prep = Prepared::new(&data(&ys, &xs)).unwrap();
    for div in [Divisor::Ml, Divisor::Dof] {
        let est = prep.estimate(&opts(Method::Fgls, div)).unwrap();
        let (b, cov) = dense_gls(&ys, &xs, &est.omega);
        let v = prep.coef_covariance(&est).unwrap();
        for j in 0..b.len() {
            assert_relative_eq!(est.coef[j], b[j], max_relative = 1e-10);
            for l in 0..b.len() {
                assert_relative_eq!(v[[j, l]], cov[[j, l]], max_relative = 1e-9, epsilon = 1e-14);
            }
        }
    }
}

#[test]
fn omega_from_ols_residuals_uses_the_divisor() {
    let (ys, xs) = system(&[3, 2], 25, 3);
    let prep = Prepared::new(&data(&ys, &xs)).unwrap();
    let e0 = &ys[0] - &xs[0].dot(&ols(&ys[0], &xs[0]));
    let e1 = &ys[1] - &xs[1].dot(&ols(&ys[1], &xs[1]));
    let ml = prep.estimate(&opts(Method::Fgls, Divisor::Ml)).unwrap();
    let dof = prep.estimate(&opts(Method::Fgls, Divisor::Dof)).unwrap();
    assert_relative_eq!(ml.omega[[0, 1]], e0.dot(&e1) / 25.0, max_relative = 1e-12);
    assert_relative_eq!(
        dof.omega[[0, 1]],
        e0.dot(&e1) / (22.0f64 * 23.0).sqrt(),
        max_relative = 1e-12
    );
    assert_relative_eq!(dof.omega[[1, 1]], e1.dot(&e1) / 23.0, max_relative = 1e-12);
}

#[test]
fn iterated_fit_reaches_the_ml_fixed_point() {
    // Oberhofer & Kmenta (1974): at the fixed point Omega = S/T of its own residuals.
    let (ys, xs) = system(&[2, 3, 3, 2], 50, 5);
    let d = data(&ys, &xs);
    let prep = Prepared::new(&d).unwrap();
    let est = prep
        .estimate(&opts(Method::IteratedFgls, Divisor::Ml))
        .unwrap();
    assert!(est.converged);
    assert_eq!(est.criterion_path.len(), est.n_iter);
    let e = d.residuals(est.coef.as_slice().unwrap());
    let s = e.t().dot(&e) / 50.0;
    for i in 0..4 {
        for j in 0..4 {
            assert_relative_eq!(
                est.omega[[i, j]],
                s[[i, j]],
                max_relative = 1e-9,
                epsilon = 1e-12
            );
            assert_relative_eq!(
                est.resid_crossprod()[[i, j]] / 50.0,
                s[[i, j]],
                max_relative = 1e-10,
                epsilon = 1e-13
            );
        }
    }
    // and it is the GLS estimate for its own Omega
    let (b, _) = dense_gls(&ys, &xs, &est.omega);
    for j in 0..b.len() {
        assert_relative_eq!(est.coef[j], b[j], max_relative = 1e-9);
    }
}

#[test]
fn identical_regressors_give_ols() {
    // Zellner (1962), Kruskal's theorem: with the same X in every equation GLS equals OLS.
    let (ys, xs) = system(&[3, 3, 3], 30, 9);
    let x = xs[0].clone();
    let xs2 = vec![x.clone(), x.clone(), x.clone()];
    let prep = Prepared::new(&data(&ys, &xs2)).unwrap();
    assert!(matches!(
        prep.cross,
        crate::CrossProducts::SharedRegressors { .. }
    ));
    let o = prep.estimate(&opts(Method::Ols, Divisor::Ml)).unwrap();
    let g = prep
        .estimate(&opts(Method::IteratedFgls, Divisor::Ml))
        .unwrap();
    assert_eq!(g.n_iter, 1);
    for j in 0..9 {
        assert_relative_eq!(o.coef[j], g.coef[j], max_relative = 1e-14);
    }
    // and both equal the dense GLS, covariance included
    let (b, cov) = dense_gls(&ys, &xs2, &g.omega);
    let v = prep.coef_covariance(&g).unwrap();
    for j in 0..9 {
        assert_relative_eq!(g.coef[j], b[j], max_relative = 1e-10);
        for l in 0..9 {
            assert_relative_eq!(v[[j, l]], cov[[j, l]], max_relative = 1e-9, epsilon = 1e-14);
        }
    }
}

#[test]
fn shared_and_general_paths_agree() {
    // Copy X so the fast path sees different buffers with equal values; then perturb nothing.
    let (ys, xs) = system(&[3, 3], 30, 13);
    let xs2 = vec![xs[0].clone(), xs[0].clone()];
    let prep = Prepared::new(&data(&ys, &xs2)).unwrap();
    assert!(matches!(
        prep.cross,
        crate::CrossProducts::SharedRegressors { .. }
    ));
    // the general path on the same numbers: add a zero-effect column to break the identity
    let mut x_aug = xs[0].clone();
    x_aug.column_mut(2).mapv_inplace(|v| v * (1.0 + 1e-9));
    let xs3 = vec![xs[0].clone(), x_aug];
    let prep3 = Prepared::new(&data(&ys, &xs3)).unwrap();
    assert!(matches!(prep3.cross, crate::CrossProducts::General { .. }));
    let a = prep.estimate(&opts(Method::Fgls, Divisor::Ml)).unwrap();
    let b = prep3.estimate(&opts(Method::Fgls, Divisor::Ml)).unwrap();
    for j in 0..6 {
        assert_relative_eq!(a.coef[j], b.coef[j], max_relative = 1e-6);
    }
}

#[test]
fn large_means_do_not_cost_digits() {
    // y with a mean 1e7 times its residual scale: the residual cross-products stay exact.
    let (mut ys, xs) = system(&[2, 3], 40, 21);
    for y in ys.iter_mut() {
        *y += 1e7;
    }
    let d = data(&ys, &xs);
    let prep = Prepared::new(&d).unwrap();
    let est = prep.estimate(&opts(Method::Ols, Divisor::Ml)).unwrap();
    let e = d.residuals(est.coef.as_slice().unwrap());
    let s = e.t().dot(&e);
    for i in 0..2 {
        for j in 0..2 {
            assert_relative_eq!(
                est.resid_crossprod()[[i, j]],
                s[[i, j]],
                max_relative = 1e-7
            );
        }
    }
}

#[test]
fn errors_name_equation_row_and_column() {
    let (mut ys, mut xs) = system(&[3, 3], 20, 1);
    ys[1][7] = f64::NAN;
    match Prepared::new(&data(&ys, &xs)) {
        Err(SurError::NonFinite {
            equation,
            row,
            column,
            ..
        }) => {
            assert_eq!((equation.as_str(), row, column), ("e1", 7, None));
        }
        other => panic!("expected NonFinite, got {other:?}"),
    }
    ys[1][7] = 1.0;
    xs[0][[4, 2]] = f64::INFINITY;
    match Prepared::new(&data(&ys, &xs)) {
        Err(SurError::NonFinite {
            equation,
            row,
            column,
            value,
        }) => {
            assert_eq!(
                (equation.as_str(), row, column.as_deref(), value.as_str()),
                ("e0", 4, Some("x2"), "inf")
            );
        }
        other => panic!("expected NonFinite, got {other:?}"),
    }
    xs[0][[4, 2]] = 0.0;
    let c = &xs[1].column(1) + &xs[1].column(2);
    xs[1].column_mut(2).assign(&(&c * 2.0));
    let mut x3 = Array2::<f64>::zeros((20, 4));
    x3.slice_mut(s![.., ..3]).assign(&xs[1]);
    x3.column_mut(3).assign(&(&xs[1].column(1) * 2.0 + 3.0));
    let xs2 = vec![xs[0].clone(), x3];
    match Prepared::new(&data(&ys, &xs2)) {
        Err(SurError::Collinear {
            equation,
            column,
            detail,
        }) => {
            assert_eq!((equation.as_str(), column.as_str()), ("e1", "x3"));
            assert!(
                detail.contains("'x0'") && detail.contains("'x1'"),
                "{detail}"
            );
        }
        other => panic!("expected Collinear, got {other:?}"),
    }
    let short_y: Vec<Array1<f64>> = ys.iter().map(|y| y.slice(s![..3]).to_owned()).collect();
    let short_x: Vec<Array2<f64>> = xs.iter().map(|x| x.slice(s![..3, ..]).to_owned()).collect();
    assert!(matches!(
        Prepared::new(&data(&short_y, &short_x)),
        Err(SurError::TooFewObservations { .. })
    ));
    assert!(matches!(
        Prepared::new(&SystemData::new(vec![])),
        Err(SurError::EmptySystem)
    ));
}

#[test]
fn budget_shares_give_a_singular_omega_naming_the_equations() {
    let t = 30;
    let mut rng = Rng(99);
    let x = Array2::from_shape_fn((t, 2), |(r, j)| if j == 0 { 1.0 } else { r as f64 / 10.0 });
    let a: Array1<f64> = (0..t)
        .map(|r| 0.3 + 0.01 * r as f64 + 0.02 * rng.normal())
        .collect();
    let b: Array1<f64> = (0..t).map(|_| 0.3 + 0.02 * rng.normal()).collect();
    let c = a.mapv(|v| 1.0 - v) - &b;
    let x2 = x.clone();
    let mut x3 = Array2::<f64>::zeros((t, 3));
    x3.slice_mut(s![.., ..2]).assign(&x);
    x3.column_mut(2)
        .assign(&(0..t).map(|_| rng.normal()).collect::<Array1<f64>>());
    let d = SystemData::new(vec![
        Equation::new("food", a.view(), x.view()),
        Equation::new("housing", b.view(), x2.view()),
        Equation::new("other", c.view(), x.view()),
    ]);
    let prep = Prepared::new(&d).unwrap();
    match prep.estimate(&opts(Method::Fgls, Divisor::Ml)) {
        Err(SurError::SingularOmega { equations, detail }) => {
            assert_eq!(equations, vec!["food", "housing", "other"]);
            assert!(detail.contains("Drop one"), "{detail}");
        }
        other => panic!("expected SingularOmega, got {other:?}"),
    }
}

#[test]
fn iteration_cap_is_reported() {
    let (ys, xs) = system(&[2, 4, 3], 30, 17);
    let prep = Prepared::new(&data(&ys, &xs)).unwrap();
    let est = prep
        .estimate(&FitOptions {
            method: Method::IteratedFgls,
            divisor: Divisor::Ml,
            tol: 0.0,
            max_iter: 3,
            ..Default::default()
        })
        .unwrap();
    assert!(!est.converged);
    assert_eq!(est.n_iter, 3);
    assert_eq!(est.criterion_path.len(), 3);
    // the path shrinks: the iteration is a contraction near the fixed point
    assert!(est.criterion_path[2] < est.criterion_path[0]);
}

#[test]
fn log_likelihood_formula_and_maximum() {
    let (ys, xs) = system(&[2, 3], 40, 23);
    let d = data(&ys, &xs);
    let prep = Prepared::new(&d).unwrap();
    let est = prep
        .estimate(&opts(Method::IteratedFgls, Divisor::Ml))
        .unwrap();
    let ll = prep.log_likelihood(est.resid_crossprod()).unwrap();
    let e = d.residuals(est.coef.as_slice().unwrap());
    let s = e.t().dot(&e) / 40.0;
    let det = s[[0, 0]] * s[[1, 1]] - s[[0, 1]] * s[[1, 0]];
    let expect =
        -0.5 * 2.0 * 40.0 * (1.0 + (2.0 * std::f64::consts::PI).ln()) - 0.5 * 40.0 * det.ln();
    assert_relative_eq!(ll, expect, max_relative = 1e-12);
    // concentrated likelihood is maximal at the ML estimate: perturbing lowers it
    let mut coef = est.coef.to_vec();
    coef[1] += 1e-3;
    let e2 = d.residuals(&coef);
    let s2 = e2.t().dot(&e2) / 40.0;
    let det2 = s2[[0, 0]] * s2[[1, 1]] - s2[[0, 1]] * s2[[1, 0]];
    assert!(det2 > det);
}

/// Tree-merges summaries pairwise, to exercise associativity.
fn tree_merge<T>(mut level: Vec<T>, merge: impl Fn(T, T) -> T) -> T {
    while level.len() > 1 {
        let mut next = Vec::new();
        let mut it = level.into_iter();
        while let Some(a) = it.next() {
            next.push(match it.next() {
                Some(b) => merge(a, b),
                None => a,
            });
        }
        level = next;
    }
    level.pop().unwrap()
}

/// Rows a..b of the system (ys, xs), equations named e0, e1, ...
fn rows_of<'a>(ys: &'a [Array1<f64>], xs: &'a [Array2<f64>], a: usize, b: usize) -> SystemData<'a> {
    SystemData::new(
        ys.iter()
            .zip(xs)
            .enumerate()
            .map(|(i, (y, x))| {
                Equation::new(format!("e{i}"), y.slice(s![a..b]), x.slice(s![a..b, ..]))
            })
            .collect(),
    )
}

fn chunked_prepared(
    ys: &[Array1<f64>],
    xs: &[Array2<f64>],
    bounds: &[usize],
    one_pass: bool,
) -> Prepared {
    try_chunked_prepared(ys, xs, bounds, one_pass).unwrap()
}

/// The chunk summaries of the rows `bounds[c]..bounds[c + 1]`, tree-merged (one pass) or merged
/// last chunk first (two passes), and the prepared system finished from them.
fn try_chunked_prepared(
    ys: &[Array1<f64>],
    xs: &[Array2<f64>],
    bounds: &[usize],
    one_pass: bool,
) -> crate::error::Result<Prepared> {
    use crate::{CrossStats, Pass2Basis, RowFactors, RowSummary};
    let names: Vec<String> = (0..ys.len()).map(|i| format!("e{i}")).collect();
    let regs: Vec<Vec<String>> = xs
        .iter()
        .map(|x| (0..x.ncols()).map(|j| format!("x{j}")).collect())
        .collect();
    let chunk = |a: usize, b: usize| rows_of(ys, xs, a, b);
    let pieces: Vec<(usize, usize)> = bounds.windows(2).map(|w| (w[0], w[1])).collect();
    if one_pass {
        let all = tree_merge(
            pieces
                .iter()
                .map(|&(a, b)| RowSummary::from_chunk(&chunk(a, b), a).unwrap())
                .collect(),
            |a, b| a.merge(b).unwrap(),
        );
        let widths: Vec<usize> = xs.iter().map(|x| x.ncols() + 1).collect();
        let (factors, stats) = all.finish(&names, &widths)?;
        return crate::stream::prepare_from_summaries(names, regs, &factors, &stats);
    }
    let factors = tree_merge(
        pieces
            .iter()
            .map(|&(a, b)| RowFactors::from_chunk(&chunk(a, b), a).unwrap())
            .collect(),
        |a, b| a.merge(b).unwrap(),
    );
    let basis = Pass2Basis::new(&factors)?;
    let mut stats: Option<CrossStats> = None;
    for &(a, b) in pieces.iter().rev() {
        let c = CrossStats::from_chunk(&chunk(a, b), &basis, a)?;
        stats = Some(match stats {
            None => c,
            Some(s) => s.merge(c)?,
        });
    }
    crate::stream::prepare_from_summaries(names, regs, &factors, &stats.unwrap())
}

#[test]
fn chunked_passes_equal_the_in_memory_fit() {
    let (ys, xs) = system(&[3, 2, 4], 53, 31);
    let full = Prepared::new(&data(&ys, &xs)).unwrap();
    let opts = opts(Method::IteratedFgls, Divisor::Ml);
    let a = full.estimate(&opts).unwrap();
    let va = full.coef_covariance(&a).unwrap();
    let all_bounds = [
        vec![0, 53],
        vec![0, 1, 2, 3, 53],
        vec![0, 10, 11, 40, 53],
        (0..=53).collect::<Vec<_>>(),
    ];
    for (bounds, one_pass) in all_bounds.iter().flat_map(|b| [(b, false), (b, true)]) {
        let prep = chunked_prepared(&ys, &xs, bounds, one_pass);
        let b = prep.estimate(&opts).unwrap();
        let vb = prep.coef_covariance(&b).unwrap();
        for j in 0..a.coef.len() {
            assert_relative_eq!(a.coef[j], b.coef[j], max_relative = 1e-11);
            assert_relative_eq!(va[[j, j]], vb[[j, j]], max_relative = 1e-10);
        }
        for i in 0..3 {
            assert_relative_eq!(
                full.factors[i].tss_centred,
                prep.factors[i].tss_centred,
                max_relative = 1e-12
            );
            assert_eq!(
                full.factors[i].spans_constant,
                prep.factors[i].spans_constant
            );
        }
    }
}

#[test]
fn chunk_summaries_keep_the_largest_y_and_refuse_it_out_of_range_as_in_memory() {
    use crate::{CrossStats, Pass2Basis, RowFactors, RowSummary};
    let (mut ys, xs) = system(&[3, 2, 4], 53, 41);
    let bounds = [0, 7, 8, 30, 53];
    let pieces: Vec<(usize, usize)> = bounds.windows(2).map(|w| (w[0], w[1])).collect();
    let names: Vec<String> = (0..3).map(|i| format!("e{i}")).collect();
    let widths: Vec<usize> = xs.iter().map(|x| x.ncols() + 1).collect();
    let chunk = |a: usize, b: usize| rows_of(&ys, &xs, a, b);
    // The merged running maximum is the largest |y_i| over all rows, exactly, whatever the
    // merge order (max is exact, commutative and associative).
    let truth: Vec<f64> = ys
        .iter()
        .map(|y| y.iter().fold(0.0f64, |m, v| m.max(v.abs())))
        .collect();
    let summaries = || {
        pieces
            .iter()
            .map(|&(a, b)| RowSummary::from_chunk(&chunk(a, b), a).unwrap())
    };
    let tree = tree_merge(summaries().collect(), |a, b| a.merge(b).unwrap());
    let backwards = summaries()
        .rev()
        .reduce(|a, b| a.merge(b).unwrap())
        .unwrap();
    assert_eq!(tree.y_max, truth);
    assert_eq!(backwards.y_max, truth);
    let factors = tree_merge(
        pieces
            .iter()
            .map(|&(a, b)| RowFactors::from_chunk(&chunk(a, b), a).unwrap())
            .collect(),
        |a, b| a.merge(b).unwrap(),
    );
    assert_eq!(factors.y_max, truth);
    assert_eq!(tree.finish(&names, &widths).unwrap().0.y_max, truth);
    let basis = Pass2Basis::new(&factors).unwrap();
    let stats: Vec<CrossStats> = pieces
        .iter()
        .map(|&(a, b)| CrossStats::from_chunk(&chunk(a, b), &basis, a).unwrap())
        .collect();
    assert_eq!(tree_merge(stats, |a, b| a.merge(b).unwrap()).y_max, truth);
    assert!(factors.check_y_range(&names).is_ok());

    // Equation e1's y scaled out of range: every streamed route gives the in-memory error
    // (the same variant, equation and message), and so does the merged pass-1 summary's check;
    // at 1e307 the factors overflow (pass 2 cannot run: only the check after pass 1 and the
    // one-pass route are asked), and the refusal comes first.
    let base = ys[1].clone();
    for (scale, two_pass) in [
        (1e200, true),
        (1e-200, true),
        (1e-300, true),
        (1e307, false),
    ] {
        ys[1] = &base * scale;
        let expected = Prepared::new(&data(&ys, &xs)).unwrap_err();
        match &expected {
            SurError::Scale { equation, .. } => assert_eq!(equation, "e1"),
            other => panic!("expected the in-memory Scale error at {scale:e}, got {other:?}"),
        }
        let modes: &[bool] = if two_pass { &[true, false] } else { &[true] };
        for &one_pass in modes {
            let got = try_chunked_prepared(&ys, &xs, &bounds, one_pass).unwrap_err();
            assert_eq!(got, expected, "scale {scale:e}, one pass {one_pass}");
        }
        let pass1 = pieces
            .iter()
            .map(|&(a, b)| RowFactors::from_chunk(&rows_of(&ys, &xs, a, b), a).unwrap())
            .reduce(|a, b| a.merge(b).unwrap())
            .unwrap();
        assert_eq!(
            pass1.check_y_range(&names).unwrap_err(),
            expected,
            "pass 1, scale {scale:e}"
        );
    }
    // Just inside the range, and a y of zeros (max 0), are not refused.
    for scale in [1e100, 1e-100, 0.0] {
        ys[1] = &base * scale;
        for one_pass in [true, false] {
            assert!(
                try_chunked_prepared(&ys, &xs, &bounds, one_pass).is_ok(),
                "scale {scale:e}"
            );
        }
    }
}

#[test]
fn chunk_errors_count_rows_from_the_start_of_the_sample() {
    let (mut ys, xs) = system(&[2, 2], 30, 37);
    ys[1][17] = f64::NAN;
    let chunk = SystemData::new(vec![
        Equation::new("e0", ys[0].slice(s![10..20]), xs[0].slice(s![10..20, ..])),
        Equation::new("e1", ys[1].slice(s![10..20]), xs[1].slice(s![10..20, ..])),
    ]);
    match crate::RowFactors::from_chunk(&chunk, 10) {
        Err(SurError::NonFinite { row, equation, .. }) => {
            assert_eq!((row, equation.as_str()), (17, "e1"))
        }
        other => panic!("expected NonFinite, got {other:?}"),
    }
}

#[test]
fn batch_equals_single_fits_and_isolates_errors() {
    let mut systems_data = Vec::new();
    for seed in 0..20u64 {
        systems_data.push(system(&[3, 3, 2], 40, 100 + seed));
    }
    // system 5 gets a NaN
    systems_data[5].0[1][3] = f64::NAN;
    let systems: Vec<SystemData> = systems_data.iter().map(|(y, x)| data(y, x)).collect();
    let o = opts(Method::IteratedFgls, Divisor::Ml);
    let out = crate::batch::fit_many(&systems, &o, 2, &|| false);
    for (i, r) in out.iter().enumerate() {
        if i == 5 {
            assert!(matches!(r, Err(SurError::NonFinite { row: 3, .. })));
            continue;
        }
        // the batch takes the small-system path: the same numbers up to rounding
        let single = Prepared::new(&systems[i]).unwrap().estimate(&o).unwrap();
        for (a, b) in r.as_ref().unwrap().coef.iter().zip(single.coef.iter()) {
            assert_relative_eq!(*a, *b, max_relative = 1e-12);
        }
    }
}

#[test]
fn matrix_free_cg_equals_direct() {
    let (ys, xs) = system(&[3, 2, 4, 3], 60, 41);
    let d = data(&ys, &xs);
    let direct = Prepared::new(&d).unwrap();
    let free = Prepared::new_matrix_free(&d, &|| false).unwrap();
    for div in [
        Divisor::Ml,
        Divisor::LedoitWolfDiagonal,
        Divisor::LedoitWolfIdentity,
    ] {
        let o = FitOptions {
            method: Method::IteratedFgls,
            divisor: div,
            tol: 1e-11,
            max_iter: 200,
            cg_tol: 1e-13,
            cg_max_iter: 500,
        };
        let a = direct.estimate_with(&o, None, Some(&d), &|| false).unwrap();
        let b = free.estimate_with(&o, None, None, &|| false).unwrap();
        assert!(b.cg_residual <= 1e-13 && !b.cg_iterations.is_empty());
        assert_eq!(a.shrinkage.is_some(), div != Divisor::Ml);
        for j in 0..a.coef.len() {
            assert_relative_eq!(a.coef[j], b.coef[j], max_relative = 1e-9);
        }
        // per-equation CG standard errors equal the direct ones
        let va = direct.coef_covariance(&a).unwrap();
        let se = free
            .cg_standard_errors(&b.omega, &[1, 3], 1e-13, 500, &|| false)
            .unwrap();
        let (o1, o3) = (direct.offsets[1], direct.offsets[3]);
        for j in 0..2 {
            assert_relative_eq!(se[0][j], va[[o1 + j, o1 + j]].sqrt(), max_relative = 1e-8);
        }
        for j in 0..3 {
            assert_relative_eq!(se[1][j], va[[o3 + j, o3 + j]].sqrt(), max_relative = 1e-8);
        }
    }
}

#[test]
fn ledoit_wolf_diagonal_target_formula() {
    // Intensity = sum_{i != j} Var(s_ij) / (T sum_{i != j} s_ij^2), Var from the rows (Ledoit &
    // Wolf 2004 estimator of the variance of a sample covariance, target = diagonal).
    let mut rng = Rng(5);
    let (t, n) = (30, 6);
    let e = Array2::from_shape_fn((t, n), |_| rng.normal());
    let s = e.t().dot(&e);
    let (omega, lambda, _) = crate::estimate::ledoit_wolf(&e, &s, false);
    let sml = &s / t as f64;
    let (mut num, mut den) = (0.0, 0.0);
    for i in 0..n {
        for j in 0..n {
            if i != j {
                let mut v = 0.0;
                for r in 0..t {
                    v += (e[[r, i]] * e[[r, j]] - sml[[i, j]]).powi(2);
                }
                num += v / t as f64;
                den += sml[[i, j]].powi(2);
            }
        }
    }
    let expect = (num / (t as f64 * den)).clamp(0.0, 1.0);
    assert_relative_eq!(lambda, expect, max_relative = 1e-12);
    assert_relative_eq!(
        omega[[0, 1]],
        (1.0 - expect) * sml[[0, 1]],
        max_relative = 1e-12
    );
    assert_relative_eq!(omega[[2, 2]], sml[[2, 2]], max_relative = 1e-14);
}

#[test]
fn parallel_data_pass_equals_sequential_and_reports_the_first_bad_equation() {
    // T (K_i + 1)^2 summed is large enough here for step 0 to be shared over threads; each
    // equation's arithmetic does not depend on the thread, so results are bit-identical to
    // the one-equation-at-a-time systems below, and errors come in system order.
    let ks = [3usize, 4, 2, 5, 3, 4, 3, 2];
    let t = 20_000;
    let (ys, xs) = system(&ks, t, 41);
    let whole = Prepared::new(&data(&ys, &xs)).unwrap();
    for i in 0..ks.len() {
        let one = Prepared::new(&data(&ys[i..i + 1], &xs[i..i + 1])).unwrap();
        assert_eq!(whole.factors[i].r, one.factors[0].r);
        assert_eq!(whole.factors[i].z, one.factors[0].z);
        assert_eq!(whole.factors[i].rho, one.factors[0].rho);
        assert!(whole.factors[i].spans_constant);
    }
    let mut bad = xs.clone();
    let c = bad[6].column(1).to_owned();
    bad[6].column_mut(2).assign(&(&c * 2.0));
    bad[2][[123, 1]] = f64::NAN;
    for _ in 0..5 {
        match Prepared::new(&data(&ys, &bad)) {
            Err(SurError::NonFinite { equation, row, .. }) => {
                assert_eq!((equation.as_str(), row), ("e2", 123))
            }
            other => panic!("expected the NaN in equation e2 first, got {other:?}"),
        }
    }
    bad[2][[123, 1]] = 0.5;
    match Prepared::new(&data(&ys, &bad)) {
        Err(SurError::Collinear {
            equation, column, ..
        }) => {
            assert_eq!((equation.as_str(), column.as_str()), ("e6", "x2"))
        }
        other => panic!("expected collinear e6, got {other:?}"),
    }
}

#[test]
fn long_dot_products_keep_their_digits() {
    // Arithmetic fact: 0.1 * n rounded once is the correctly rounded sum of n copies of the
    // double nearest 0.1. A running sum over 4 million terms drifts by ~1e-10 relative; the
    // pairwise kernel must stay within a few units of the last place.
    let n = 4_000_000usize;
    let a = vec![0.1f64; n];
    let b = vec![1.0f64; n];
    let exact = 0.1 * n as f64;
    let running: f64 = a.iter().sum();
    assert!(
        ((running - exact) / exact).abs() > 1e-12,
        "the check would not tell a running sum apart"
    );
    let d = crate::kernels::dot(&a, &b);
    assert!(((d - exact) / exact).abs() < 1e-14, "dot {d} vs {exact}");
    let nrm = crate::kernels::scaled_norm(&a);
    assert_relative_eq!(nrm, (0.01 * n as f64).sqrt(), max_relative = 1e-14);
}

/// The small-system path gives the general path's numbers (coefficients, standard errors,
/// Omega, iterations, log-likelihood) for every estimator and divisor, on unequal and shared
/// regressors, one equation, and a level far from zero; and its coefficients and standard
/// errors match the dense textbook GLS formula at the same Omega.
#[test]
fn small_path_equals_general_path_and_dense_formula() {
    let mut ws = crate::batch::small::Work::default();
    let layouts: [&[usize]; 5] = [&[3, 3, 3], &[1, 4, 2], &[2], &[5, 1, 3, 2, 4], &[4, 4]];
    let mut checked = 0;
    for (l, ks) in layouts.iter().enumerate() {
        for (t, level) in [(25usize, 0.0), (60, 1e6)] {
            let (mut ys, xs) = system(ks, t, 900 + l as u64);
            for y in ys.iter_mut() {
                *y += level;
            }
            let d = data(&ys, &xs);
            let yv: Vec<_> = ys.iter().map(|y| y.view()).collect();
            let xv: Vec<_> = xs.iter().map(|x| x.view()).collect();
            for method in [Method::Ols, Method::Fgls, Method::IteratedFgls] {
                for div in [Divisor::Ml, Divisor::Dof] {
                    let o = FitOptions {
                        method,
                        divisor: div,
                        tol: 1e-12,
                        max_iter: 500,
                        ..Default::default()
                    };
                    let a = crate::batch::small::fit(&yv, &xv, &o, &mut ws).unwrap_or_else(|| {
                        panic!("declined {ks:?} T={t} {method:?} {div:?} level {level}")
                    });
                    let b = crate::batch::fit_general(&d, &o).unwrap();
                    assert_eq!(
                        (a.n_iter, a.converged),
                        (b.n_iter, b.converged),
                        "{ks:?} T={t} {method:?} {div:?}"
                    );
                    for j in 0..a.coef.len() {
                        assert_relative_eq!(a.coef[j], b.coef[j], max_relative = 1e-9);
                        assert_relative_eq!(a.se[j], b.se[j], max_relative = 1e-9);
                    }
                    for (u, v) in a.omega.iter().zip(b.omega.iter()) {
                        assert_relative_eq!(
                            *u,
                            *v,
                            max_relative = 1e-9,
                            epsilon = 1e-12 * b.omega[[0, 0]]
                        );
                    }
                    assert_relative_eq!(a.loglik, b.loglik, max_relative = 1e-11);
                    if method == Method::Fgls && level == 0.0 {
                        let (db, dcov) = dense_gls(&ys, &xs, &a.omega);
                        for j in 0..db.len() {
                            assert_relative_eq!(a.coef[j], db[j], max_relative = 1e-9);
                            assert_relative_eq!(a.se[j], dcov[[j, j]].sqrt(), max_relative = 1e-9);
                        }
                    }
                    checked += 1;
                }
            }
        }
    }
    assert_eq!(checked, 60);
    // shared regressors: FGLS is OLS (Zellner 1962), with the general path's Omega and se
    let (ys, xs) = system(&[3, 3, 3], 40, 77);
    let shared: Vec<_> = (0..3).map(|_| xs[0].clone()).collect();
    let d = data(&ys, &shared);
    let yv: Vec<_> = ys.iter().map(|y| y.view()).collect();
    let xv: Vec<_> = shared.iter().map(|x| x.view()).collect();
    for method in [Method::Ols, Method::Fgls, Method::IteratedFgls] {
        let o = FitOptions {
            method,
            ..Default::default()
        };
        let a = crate::batch::small::fit(&yv, &xv, &o, &mut ws).unwrap();
        let b = crate::batch::fit_general(&d, &o).unwrap();
        assert_eq!((a.n_iter, a.converged), (b.n_iter, b.converged));
        for j in 0..a.coef.len() {
            assert_relative_eq!(a.coef[j], b.coef[j], max_relative = 1e-12);
            assert_relative_eq!(a.se[j], b.se[j], max_relative = 1e-12);
        }
    }
}

/// Whatever needs the general path's checks or messages is declined by the small path, and
/// the batch then reports the general path's typed error for that system only.
#[test]
fn small_path_declines_what_the_general_path_must_judge() {
    let mut ws = crate::batch::small::Work::default();
    let fgls = FitOptions::default();
    let (ys, xs) = system(&[3, 3], 30, 5);
    let yv: Vec<_> = ys.iter().map(|y| y.view()).collect();
    let decline = |ys: &[Array1<f64>],
                   xs: &[Array2<f64>],
                   o: &FitOptions,
                   ws: &mut crate::batch::small::Work| {
        let yv: Vec<_> = ys.iter().map(|y| y.view()).collect();
        let xv: Vec<_> = xs.iter().map(|x| x.view()).collect();
        crate::batch::small::fit(&yv, &xv, o, ws).is_none()
    };
    // NaN in a regressor, a collinear column, a zero column, T <= K_i
    let mut bad = xs.clone();
    bad[1][[4, 2]] = f64::NAN;
    assert!(decline(&ys, &bad, &fgls, &mut ws));
    let mut col = xs.clone();
    let c = &col[0].column(1).to_owned() * 2.0;
    col[0].column_mut(2).assign(&c);
    assert!(decline(&ys, &col, &fgls, &mut ws));
    let mut zero = xs.clone();
    zero[1].column_mut(1).fill(0.0);
    assert!(decline(&ys, &zero, &fgls, &mut ws));
    let short: Vec<Array2<f64>> = xs.iter().map(|x| x.slice(s![..3, ..]).to_owned()).collect();
    let short_y: Vec<Array1<f64>> = ys.iter().map(|y| y.slice(s![..3]).to_owned()).collect();
    assert!(decline(&short_y, &short, &fgls, &mut ws));
    // an equation that fits exactly (singular Omega) and two whose residuals add to zero
    let mut exact = ys.clone();
    exact[1] = xs[1].dot(&Array1::from(vec![1.0, 2.0, 3.0]));
    assert!(decline(&exact, &xs, &fgls, &mut ws));
    let same_x: Vec<Array2<f64>> = vec![xs[0].clone(), xs[0].clone()];
    let shares = vec![ys[0].clone(), 10.0 - &ys[0]];
    assert!(decline(&shares, &same_x, &fgls, &mut ws));
    // OLS never inverts Omega, so the exact fit is fine there
    assert!(!decline(
        &exact,
        &xs,
        &FitOptions {
            method: Method::Ols,
            ..fgls
        },
        &mut ws
    ));
    // shrinkage goes to the general path
    assert!(decline(
        &ys,
        &xs,
        &FitOptions {
            divisor: Divisor::LedoitWolfDiagonal,
            ..fgls
        },
        &mut ws
    ));
    // the batch reports each declined system's own typed error and fits the rest
    let sets = [
        (ys.clone(), xs.clone()),
        (ys.clone(), bad),
        (exact, xs.clone()),
        (ys.clone(), col),
    ];
    let systems: Vec<SystemData> = sets.iter().map(|(y, x)| data(y, x)).collect();
    let out = crate::batch::fit_many(&systems, &fgls, 2, &|| false);
    assert!(out[0].is_ok());
    assert!(matches!(out[1], Err(SurError::NonFinite { row: 4, .. })));
    assert!(matches!(out[2], Err(SurError::SingularOmega { .. })));
    assert!(matches!(&out[3], Err(SurError::Collinear { column, .. }) if column == "x2"));
    let _ = yv;
}

/// Iterated FGLS step by step against the dense textbook iteration (Omega = S/T of the
/// previous step's residuals, then dense GLS): the warm-started conjugate-gradient steps give
/// the direct solves' coefficients, and the final covariance is that of the last step.
#[test]
fn iterated_steps_follow_the_dense_textbook_iteration() {
    // K = 50: at or above the size where steps after the first are warm-started
    let (ys, xs) = system(&[13, 12, 14, 11], 60, 515);
    let d = data(&ys, &xs);
    let prep = Prepared::new(&d).unwrap();
    let resid_omega = |b: &Array1<f64>| {
        let t = ys[0].len() as f64;
        let mut e = Vec::new();
        let mut off = 0;
        for (y, x) in ys.iter().zip(&xs) {
            e.push(y - &x.dot(&b.slice(s![off..off + x.ncols()])));
            off += x.ncols();
        }
        Array2::from_shape_fn((e.len(), e.len()), |(i, j)| e[i].dot(&e[j]) / t)
    };
    let mut b: Array1<f64> = ys
        .iter()
        .zip(&xs)
        .flat_map(|(y, x)| ols(y, x).to_vec())
        .collect();
    let mut omega = resid_omega(&b);
    for steps in 1..=6usize {
        let (bd, cov) = dense_gls(&ys, &xs, &omega);
        let o = FitOptions {
            method: Method::IteratedFgls,
            tol: 0.0,
            max_iter: steps,
            ..Default::default()
        };
        let est = prep.estimate(&o).unwrap();
        assert_eq!(est.n_iter, steps);
        // step 2 is warm-started; a later one factors afresh after a slow warm solve
        assert_eq!(
            est.warm_iterations.is_empty(),
            steps == 1,
            "{:?}",
            est.warm_iterations
        );
        assert!(est.warm_iterations.len() < steps);
        let se = prep
            .coef_standard_errors(&est, crate::CovKind::Classical, None)
            .unwrap();
        for j in 0..bd.len() {
            assert_relative_eq!(est.coef[j], bd[j], max_relative = 1e-10);
            assert_relative_eq!(se[j], cov[[j, j]].sqrt(), max_relative = 1e-10);
        }
        b = bd;
        omega = resid_omega(&b);
    }
}

/// A random symmetric positive definite n x n matrix A = B'B + 0.1 I (B: `rows` x n normal
/// draws), with the backend's lower Cholesky factor (`kernels::chol_lower`) and the textbook
/// one.
fn spd_with_factors(
    rng: &mut Rng,
    rows: usize,
    n: usize,
) -> (Array2<f64>, Array2<f64>, Array2<f64>) {
    let b = Array2::from_shape_fn((rows, n), |_| rng.normal());
    let a = b.t().dot(&b) + Array2::<f64>::eye(n) * 0.1;
    let l = crate::kernels::chol_lower(crate::kernels::to_fortran(&a)).unwrap();
    let want = textbook_cholesky(&a).unwrap();
    (a, l, want)
}

/// The backend's dense kernels and the batch path's own small ones against the textbook loops:
/// Cholesky factor (zeros above the diagonal; refused when not positive definite, also with
/// the negative pivot in a late block), solve, inverse, inverse of the factor, and the exact
/// 1-norm condition numbers against the definition ||A||_1 ||A^-1||_1 (Gauss-Jordan inverse).
#[test]
fn dense_kernels_match_the_textbook_loops() {
    use crate::kernels::small::{chol_solve_in_place, small_chol, small_lower_inverse};
    use crate::kernels::{
        chol_inverse, chol_lower, chol_solve, spd_condition, to_fortran, triangular_condition,
    };
    let mut rng = Rng(4242);
    for n in [1usize, 2, 5, 17, 40, 64, 65, 97, 200] {
        let (a, l, want) = spd_with_factors(&mut rng, n + 3, n);
        let scale = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (x, y) in l.iter().zip(want.iter()) {
            assert_relative_eq!(*x, *y, max_relative = 1e-10, epsilon = 1e-12 * scale);
        }
        for j in 0..n {
            for i in 0..j {
                assert_eq!(l[[i, j]], 0.0);
            }
        }
        let mut bad = a.clone();
        bad[[n - 1, n - 1]] = -1.0;
        assert!(
            chol_lower(to_fortran(&bad)).is_none(),
            "order {n}: indefinite accepted"
        );
        if n <= 64 {
            // the batch path's kernels, in caller-owned column-major buffers
            let mut own = to_fortran(&a).into_raw_vec_and_offset().0;
            assert!(small_chol(&mut own, n));
            for j in 0..n {
                for i in 0..n {
                    assert_relative_eq!(
                        own[j * n + i],
                        want[[i, j]],
                        max_relative = 1e-10,
                        epsilon = 1e-12 * scale
                    );
                }
            }
            let mut u = vec![0.0; n * n];
            small_lower_inverse(&own, n, &mut u);
            let linv = want.inv().unwrap();
            for j in 0..n {
                for i in 0..n {
                    assert_relative_eq!(
                        u[j * n + i],
                        linv[[i, j]],
                        max_relative = 1e-9,
                        epsilon = 1e-11
                    );
                }
            }
            let rhs: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
            let mut x = rhs.clone();
            chol_solve_in_place(&own, n, &mut x);
            let want_x = a.inv().unwrap().dot(&Array1::from(rhs));
            for (u, v) in x.iter().zip(want_x.iter()) {
                assert_relative_eq!(*u, *v, max_relative = 1e-9, epsilon = 1e-12);
            }
            let mut bad = to_fortran(&bad).into_raw_vec_and_offset().0;
            assert!(!small_chol(&mut bad, n));
        }
        let rhs = Array1::from_shape_fn(n, |_| rng.normal());
        let x = chol_solve(&l, &rhs).unwrap();
        let inv = a.inv().unwrap();
        let want_x = inv.dot(&rhs);
        for (u, v) in x.iter().zip(want_x.iter()) {
            assert_relative_eq!(*u, *v, max_relative = 1e-9, epsilon = 1e-12);
        }
        let got_inv = chol_inverse(&l).unwrap();
        for (u, v) in got_inv.iter().zip(inv.iter()) {
            assert_relative_eq!(*u, *v, max_relative = 1e-9, epsilon = 1e-12);
        }
        let norm1 = |m: &Array2<f64>| {
            m.columns()
                .into_iter()
                .map(|c| c.iter().map(|v| v.abs()).sum::<f64>())
                .fold(0.0, f64::max)
        };
        assert_relative_eq!(
            spd_condition(&a, &l),
            norm1(&a) * norm1(&inv),
            max_relative = 1e-9
        );
        let r = Array2::from_shape_fn((n, n), |(i, j)| {
            if j >= i {
                rng.normal() + if i == j { 3.0 } else { 0.0 }
            } else {
                0.0
            }
        });
        assert_relative_eq!(
            triangular_condition(&r),
            norm1(&r) * norm1(&r.inv().unwrap()),
            max_relative = 1e-9
        );
    }
}

/// Omega^-1 and the condition number of Omega's correlation matrix against the Gauss-Jordan
/// inverse and the definition ||C||_1 ||C^-1||_1 of the 1-norm condition number
/// (C = D^-1/2 Omega D^-1/2).
#[test]
fn omega_inverse_and_its_condition_match_the_definition() {
    use crate::estimate::omega::invert_omega;
    let mut rng = Rng(777);
    for n in [3usize, 64, 65, 150] {
        let (a, _, _) = spd_with_factors(&mut rng, n + 20, n);
        // units far apart, so that the correlation form matters
        let scale: Vec<f64> = (0..n).map(|i| 10f64.powi((i % 7) as i32 - 3)).collect();
        let omega = Array2::from_shape_fn((n, n), |(i, j)| a[[i, j]] * scale[i] * scale[j]);
        let names: Vec<String> = (0..n).map(|i| format!("e{i}")).collect();
        let (inv, cond) =
            invert_omega(&crate::kernels::to_fortran(&omega), &names, 1000, &scale).unwrap();
        let want = omega.inv().unwrap();
        let big = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (u, v) in inv.iter().zip(want.iter()) {
            assert!((u - v).abs() <= 1e-9 * big, "n={n}: {u} against {v}");
        }
        let corr =
            Array2::from_shape_fn((n, n), |(i, j)| a[[i, j]] / (a[[i, i]] * a[[j, j]]).sqrt());
        let norm1 = |m: &Array2<f64>| {
            m.columns()
                .into_iter()
                .map(|c| c.iter().map(|v| v.abs()).sum::<f64>())
                .fold(0.0, f64::max)
        };
        assert_relative_eq!(
            cond,
            norm1(&corr) * norm1(&corr.inv().unwrap()),
            max_relative = 1e-8
        );
    }
}

/// Duplicate names are found for few and for many equations (the scan and the hash-set paths
/// of the name check), naming the first repeated one.
#[test]
fn duplicate_names_are_reported_for_few_and_many_equations() {
    for n in [3usize, 40] {
        let (ys, xs) = system(&vec![2; n], 20, 77);
        let mut d = data(&ys, &xs);
        d.equations[n - 1].name = d.equations[1].name.clone();
        match d.validate() {
            Err(SurError::ShapeMismatch { equation, detail }) => {
                assert_eq!(equation, "e1");
                assert!(detail.contains("more than one equation"), "{detail}");
            }
            other => panic!("expected a duplicate-name error, got {other:?}"),
        }
        let mut d = data(&ys, &xs);
        d.equations[0].regressors = vec!["a".into(), "a".into()];
        assert!(
            matches!(d.validate(), Err(SurError::ShapeMismatch { detail, .. }) if detail.contains("'a' appears twice"))
        );
    }
}

/// The several-column kernels of step 0 (`dots`: q_j'v; `sub_combination`: v - Q c) against
/// plain loops, for column counts that leave groups of 1-3 and lengths on both sides of the
/// pairwise split (1024) and of the vector width.
#[test]
fn column_group_kernels_match_plain_loops() {
    let mut rng = Rng(5);
    for &t in &[1usize, 3, 8, 13, 1023, 1025, 2500] {
        for k in 0..=9 {
            let q: Vec<f64> = (0..t * k).map(|_| rng.normal()).collect();
            let v: Vec<f64> = (0..t).map(|_| rng.normal()).collect();
            let mut d = vec![0.0; k];
            crate::kernels::simd::dots(&q, t, &v, &mut d);
            for j in 0..k {
                let plain: f64 = (0..t).map(|i| q[j * t + i] * v[i]).sum();
                assert_relative_eq!(
                    d[j],
                    plain,
                    epsilon = 1e-12 * (t as f64).sqrt(),
                    max_relative = 1e-12
                );
            }
            let c: Vec<f64> = (0..k).map(|_| rng.normal()).collect();
            let mut w = v.clone();
            crate::kernels::simd::sub_combination(&mut w, &q, t, &c);
            for i in 0..t {
                let plain = v[i] - (0..k).map(|j| c[j] * q[j * t + i]).sum::<f64>();
                assert_relative_eq!(w[i], plain, epsilon = 1e-13, max_relative = 1e-13);
            }
        }
    }
}

#[test]
fn scatter_and_centred_squares_match_plain_loops() {
    let mut rng = Rng(11);
    for k in 0..=11usize {
        for &r in &[0usize, 1, 5, 37] {
            let rows: Vec<f64> = (0..r * k).map(|_| rng.normal()).collect();
            let ld = r + 3;
            let mut dst = vec![f64::NAN; ld * k.max(1)];
            // SAFETY: column j is dst[j * ld..j * ld + r], within the buffer.
            unsafe { crate::kernels::dot2::scatter_rows(&rows, k, dst.as_mut_ptr(), ld) };
            for j in 0..k {
                for i in 0..r {
                    assert_eq!(dst[j * ld + i].to_bits(), rows[i * k + j].to_bits());
                }
                for i in r..ld.min(dst.len() - j * ld) {
                    assert!(dst[j * ld + i].is_nan(), "wrote outside column {j}");
                }
            }
        }
    }
    for &t in &[1usize, 7, 8, 9, 1000] {
        let y: Vec<f64> = (0..t).map(|_| 1e3 + rng.normal()).collect();
        let mean = y.iter().sum::<f64>() / t as f64;
        let plain: f64 = y.iter().map(|v| (v - mean) * (v - mean)).sum();
        assert_relative_eq!(
            crate::kernels::simd::centred_squares(&y, mean),
            plain,
            max_relative = 1e-12
        );
    }
}

#[test]
fn input_memory_layout_does_not_change_a_bit() {
    // Row-major input is transposed (and a copy kept for the refinement), column-major input
    // is read in place, a strided view goes element by element: the same numbers in the same
    // order, so the fits must agree to the last bit. K_i = 3 and 10 cover the fixed-width and
    // the general transposition.
    let (ys, xs) = system(&[3, 10, 4], 300, 17);
    let fit = |xs: &[Array2<f64>], strided: bool| {
        let big: Vec<Array2<f64>> = xs
            .iter()
            .map(|x| {
                let mut b = Array2::<f64>::zeros((x.nrows(), 2 * x.ncols()));
                b.slice_mut(s![.., ..;2]).assign(x);
                b
            })
            .collect();
        let views: Vec<_> = if strided {
            big.iter().map(|b| b.slice(s![.., ..;2])).collect()
        } else {
            xs.iter().map(|x| x.view()).collect()
        };
        let d = SystemData::new(
            ys.iter()
                .zip(&views)
                .enumerate()
                .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), *x))
                .collect(),
        );
        let p = Prepared::new(&d).unwrap();
        let e = p.estimate(&opts(Method::Fgls, Divisor::Ml)).unwrap();
        (
            e.coef.to_vec(),
            e.omega.iter().copied().collect::<Vec<f64>>(),
        )
    };
    let rows = fit(&xs, false);
    let cols: Vec<Array2<f64>> = xs.iter().map(crate::kernels::to_fortran).collect();
    assert!(cols[0].t().is_standard_layout());
    for other in [fit(&cols, false), fit(&xs, true)] {
        for (a, b) in rows
            .0
            .iter()
            .zip(&other.0)
            .chain(rows.1.iter().zip(&other.1))
        {
            assert_eq!(a.to_bits(), b.to_bits());
        }
    }
}

/// A triangular solve names the defect it finds on the diagonal: zero, or NaN/inf (common
/// practice: back substitution divides by each diagonal entry).
#[test]
fn triangular_solves_name_the_defect_on_the_diagonal() {
    use crate::kernels::{upper_inverse, upper_solve};
    let good = ndarray::array![[2.0, 1.0], [0.0, 4.0]];
    let inv = upper_inverse(&good).unwrap();
    assert_relative_eq!(
        inv,
        ndarray::array![[0.5, -0.125], [0.0, 0.25]],
        max_relative = 1e-15
    );
    let x = upper_solve(&good, &ndarray::array![3.0, 8.0]).unwrap();
    assert_relative_eq!(x, ndarray::array![0.5, 2.0], max_relative = 1e-15);
    for (d, want) in [
        (0.0, "zero on the diagonal, at position 1"),
        (
            f64::NAN,
            "non-finite value (NaN) on the diagonal, at position 1",
        ),
        (
            f64::INFINITY,
            "non-finite value (inf) on the diagonal, at position 1",
        ),
    ] {
        let mut r = good.clone();
        r[[1, 1]] = d;
        for err in [
            upper_inverse(&r).unwrap_err(),
            upper_solve(&r, &ndarray::array![1.0, 1.0]).unwrap_err(),
        ] {
            match err {
                SurError::Numerical { context, detail } => {
                    assert_eq!(context, "triangular solve");
                    assert_eq!(detail, want);
                }
                other => panic!("expected a numerical error, got {other:?}"),
            }
        }
    }
}
