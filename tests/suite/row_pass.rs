//! The tiled row pass against a plain row-by-row computation of the same quantities:
//! responsibilities, log-likelihood, the Gaussian M-step sums and the gating score and
//! Hessian, over shapes that take each kernel (registers or general loops, short tiles,
//! several parallel tasks, zero case weights), and the same bits at 1 and 2 threads.

use cohortmix::data::Design;
use cohortmix::model::family::gaussian::GaussianRows;
use cohortmix::model::family::{Block, Components, CovarianceStructure, GaussianComponents};
use cohortmix::model::gating::{Gating, GatingStats};
use cohortmix::model::{e_step_sums, e_step_with, FitData, GaussianStats, Model};
use cohortmix::rng::Stream;
use nalgebra::DMatrix;
use std::sync::Arc;

struct Case {
    n: usize,
    d: usize,
    q: usize,
    p: usize,
    g: usize,
    logit: bool,
}

struct Arrays {
    y: Vec<f64>,
    z: Vec<f64>,
    w: Vec<f64>,
    c: Vec<f64>,
}

fn arrays(case: &Case, rng: &mut Stream) -> Arrays {
    let Case { n, d, q, p, .. } = *case;
    let y = (0..n * d).map(|i| rng.normal() * 2.0 + (i % 3) as f64).collect();
    let design = |k: usize, rng: &mut Stream| -> Vec<f64> {
        (0..n * k)
            .map(|i| if i % k == 0 { 1.0 } else { rng.normal() })
            .collect()
    };
    let z = design(q, rng);
    let w = design(p, rng);
    // Every seventh row has weight 0 (a bootstrap replicate leaves rows out this way).
    let c = (0..n)
        .map(|i| if i % 7 == 3 { 0.0 } else { 0.5 + rng.uniform() })
        .collect();
    Arrays { y, z, w, c }
}

fn model(case: &Case, fd: &FitData, ar: &Arrays, rng: &mut Stream) -> Model {
    let Case { n, d, q, p, g, .. } = *case;
    let coef = (0..g * q * d).map(|_| rng.normal()).collect();
    let cov = (0..g)
        .map(|_| {
            let a = DMatrix::from_fn(d, d, |_, _| rng.normal() * 0.5);
            &a * a.transpose() + DMatrix::identity(d, d) * 0.7
        })
        .collect();
    let design = Design {
        terms: (0..q)
            .map(|a| cohortmix::data::Term {
                name: format!("z{a}"),
                covariate: (a > 0).then(|| format!("z{a}")),
                center: 0.0,
                scale: 1.0,
            })
            .collect(),
        x: Arc::new(ar.z.clone()),
        n,
    };
    let names = (0..d).map(|j| format!("y{j}")).collect();
    let rows = Arc::new(GaussianRows::new(names, Arc::new(ar.y.clone()), design));
    let gaussian = GaussianComponents::new(rows, fd.weights, g, CovarianceStructure::UNCONSTRAINED)
        .with_parameters(coef, cov)
        .expect("positive definite");
    let gating = if case.logit && g > 1 {
        Gating::Logit {
            g,
            p,
            gamma: (0..(g - 1) * p).map(|_| rng.normal() * 0.4).collect(),
            ridge: 0.0,
            bound_inverse: None,
        }
    } else {
        let raw: Vec<f64> = (0..g).map(|k| 1.0 + k as f64).collect();
        let total: f64 = raw.iter().sum();
        Gating::Free {
            log_pi: raw.iter().map(|x| (x / total).ln()).collect(),
        }
    };
    Model {
        gating,
        components: Components {
            blocks: vec![Box::new(gaussian)],
        },
    }
}

/// What the pass should produce, row by row in the plainest way.
struct Expected {
    tau: Vec<f64>,
    loglik: f64,
    gaussian: GaussianStats,
    score: Vec<f64>,
    neg_hessian: Vec<f64>,
    cluster_weight: Vec<f64>,
}

fn expected(case: &Case, fd: &FitData, ar: &Arrays, m: &Model) -> Expected {
    let Case { n, d, q, p, g, .. } = *case;
    let gc = m.components.find::<GaussianComponents>().expect("gaussian");
    let mut logd = vec![0.0; n * g];
    gc.add_log_density(&mut logd);
    let mut tau = vec![0.0; n * g];
    let mut loglik = 0.0;
    let mut st = GaussianStats {
        g,
        q,
        d,
        rows: vec![0.0; g],
        weight: vec![0.0; g],
        zz: vec![0.0; g * q * q],
        zr: vec![0.0; g * q * d],
        rr: vec![0.0; g * d * d],
        at: gc.coef.clone(),
    };
    let mm = (g - 1) * p;
    let (mut score, mut neg_hessian, mut cluster_weight) = (vec![0.0; mm], vec![0.0; mm * mm], vec![0.0; g]);
    let mut lp = vec![0.0; g];
    let mut mu = vec![0.0; d];
    for i in 0..n {
        let (w, z, y, c) = (
            &fd.w[i * p..(i + 1) * p],
            &ar.z[i * q..(i + 1) * q],
            &ar.y[i * d..(i + 1) * d],
            fd.weights[i],
        );
        m.gating.log_priors(w, &mut lp);
        let joint: Vec<f64> = (0..g).map(|k| logd[i * g + k] + lp[k]).collect();
        let top = joint.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let total: f64 = joint.iter().map(|x| (x - top).exp()).sum();
        loglik += c * (top + total.ln());
        for k in 0..g {
            let t = (joint[k] - top).exp() / total;
            tau[i * g + k] = t;
            let v = c * t;
            cluster_weight[k] += v;
            if c != 0.0 {
                st.rows[k] += t;
            }
            st.weight[k] += v;
            gc.mean(k, z, &mut mu);
            let r: Vec<f64> = y.iter().zip(&mu).map(|(a, b)| a - b).collect();
            for a in 0..q {
                for b in 0..=a {
                    st.zz[(k * q + a) * q + b] += v * z[a] * z[b];
                }
                for (j, rj) in r.iter().enumerate() {
                    st.zr[(k * q + a) * d + j] += v * z[a] * rj;
                }
            }
            for a in 0..d {
                for b in 0..=a {
                    st.rr[(k * d + a) * d + b] += v * r[a] * r[b];
                }
            }
        }
        let pi: Vec<f64> = lp.iter().map(|x| x.exp()).collect();
        for k in 1..g {
            for a in 0..p {
                score[(k - 1) * p + a] += c * (tau[i * g + k] - pi[k]) * w[a];
            }
            for l in 1..=k {
                let h = c * pi[k] * (if k == l { 1.0 } else { 0.0 } - pi[l]);
                for a in 0..p {
                    for b in 0..p {
                        let (r, col) = ((k - 1) * p + a, (l - 1) * p + b);
                        if col <= r {
                            neg_hessian[r * mm + col] += h * w[a] * w[b];
                        }
                    }
                }
            }
        }
    }
    Expected {
        tau,
        loglik,
        gaussian: st,
        score,
        neg_hessian,
        cluster_weight,
    }
}

fn close(what: &str, got: &[f64], want: &[f64], scale: f64) {
    assert_eq!(got.len(), want.len(), "{what}: lengths");
    for (i, (a, b)) in got.iter().zip(want).enumerate() {
        assert!(
            (a - b).abs() <= 1e-10 * (scale + b.abs()),
            "{what}[{i}]: pass {a}, row by row {b}"
        );
    }
}

/// The lower triangles (what the M-steps read) of two row-major square blocks.
fn lower(x: &[f64], size: usize) -> Vec<f64> {
    let mut out = Vec::new();
    for block in x.chunks_exact(size * size) {
        for a in 0..size {
            out.extend_from_slice(&block[a * size..a * size + a + 1]);
        }
    }
    out
}

fn run(case: Case, seed: u64) {
    let mut rng = Stream::new(seed, "row pass");
    let ar = arrays(&case, &mut rng);
    let fd = FitData {
        n: case.n,
        weights: &ar.c,
        w: &ar.w,
        p: case.p,
    };
    let m = model(&case, &fd, &ar, &mut rng);
    let want = expected(&case, &fd, &ar, &m);
    let pass = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        pool.install(|| {
            let mut tau = vec![0.0; case.n * case.g];
            let (mut gs, mut ss) = (GatingStats::default(), GaussianStats::default());
            let loglik = e_step_with(&m, &fd, &mut tau, Some(&mut gs), Some(&mut ss));
            (tau, loglik, gs, ss)
        })
    };
    let (tau, loglik, gs, ss) = pass(1);
    close("tau", &tau, &want.tau, 1.0);
    close("loglik", &[loglik], &[want.loglik], 0.0);
    let n = case.n as f64;
    close("rows", &ss.rows, &want.gaussian.rows, n);
    close("weight", &ss.weight, &want.gaussian.weight, n);
    close("zz", &lower(&ss.zz, case.q), &lower(&want.gaussian.zz, case.q), n);
    close("zr", &ss.zr, &want.gaussian.zr, n);
    close("rr", &lower(&ss.rr, case.d), &lower(&want.gaussian.rr, case.d), n);
    assert_eq!(
        ss.at, want.gaussian.at,
        "the sums are taken around the model's coefficients"
    );
    close("cluster weight", &gs.cluster_weight, &want.cluster_weight, n);
    if case.logit && case.g > 1 {
        close("score", &gs.score, &want.score, n);
        let mm = (case.g - 1) * case.p;
        close(
            "neg Hessian",
            &lower(&gs.neg_hessian, mm),
            &lower(&want.neg_hessian, mm),
            n,
        );
    }
    let (tau2, loglik2, gs2, ss2) = pass(2);
    assert_eq!(loglik.to_bits(), loglik2.to_bits(), "log-likelihood at 2 threads");
    assert!(
        tau.iter().zip(&tau2).all(|(a, b)| a.to_bits() == b.to_bits()),
        "responsibilities at 2 threads"
    );
    assert_eq!(gs, gs2, "gating sums at 2 threads");
    assert_eq!(ss, ss2, "Gaussian sums at 2 threads");

    // The pass that keeps no responsibilities (a logit needs its bound prepared for
    // that) sums the same bits.
    let mut m = m;
    m.gating.prepare_bound(fd.w, fd.weights);
    assert!(m.steps_from_sums(), "a Gaussian model's M-step runs from sums");
    for threads in [1, 2] {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        let (loglik3, gs3, ss3) = pool.install(|| {
            let (mut gs, mut ss) = (GatingStats::default(), GaussianStats::default());
            let loglik = e_step_sums(&m, &fd, &mut gs, &mut ss);
            (loglik, gs, ss)
        });
        assert_eq!(
            loglik.to_bits(),
            loglik3.to_bits(),
            "log-likelihood without responsibilities"
        );
        assert_eq!(gs, gs3, "gating sums without responsibilities");
        assert_eq!(ss, ss3, "Gaussian sums without responsibilities");
    }
}

#[test]
fn one_cluster_one_indicator_short_tile() {
    run(
        Case {
            n: 37,
            d: 1,
            q: 1,
            p: 1,
            g: 1,
            logit: false,
        },
        1,
    );
}

#[test]
fn logit_gating_three_clusters_in_registers() {
    run(
        Case {
            n: 300,
            d: 3,
            q: 1,
            p: 4,
            g: 3,
            logit: true,
        },
        2,
    );
}

#[test]
fn several_parallel_tasks_with_a_ragged_end() {
    // More than one task of 8,192 rows, and a last tile that is not a multiple of 8.
    run(
        Case {
            n: 17_000 + 5,
            d: 5,
            q: 1,
            p: 3,
            g: 4,
            logit: true,
        },
        3,
    );
}

#[test]
fn component_covariates_take_the_general_loops() {
    run(
        Case {
            n: 513,
            d: 4,
            q: 3,
            p: 2,
            g: 5,
            logit: true,
        },
        4,
    );
}

#[test]
fn many_indicators_take_the_general_loops() {
    run(
        Case {
            n: 700,
            d: 7,
            q: 1,
            p: 1,
            g: 2,
            logit: false,
        },
        5,
    );
    run(
        Case {
            n: 259,
            d: 9,
            q: 1,
            p: 1,
            g: 2,
            logit: false,
        },
        6,
    );
}
