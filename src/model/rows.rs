//! Passes over rows in fixed tiles: the E-step with the sums the next M-step needs, and
//! the multinomial-logit pass of the gating fit.
//!
//! Rows are cut into tiles of [`TILE`] rows. A tile's columns are copied into
//! column-major scratch (one contiguous run per column), so that every loop over rows is
//! a plain loop over slices that the compiler turns into vector instructions; sums over
//! rows use eight independent lanes ([`dot`]) for the same reason. Tiles are grouped
//! into tasks of [`TASK_ROWS`] rows that rayon runs in parallel. Every task adds its tiles
//! in order and the task sums are added in task order, so results do not depend on the
//! number of threads. Scratch is allocated once per task, never inside a row loop.
//!
//! The kernels are compiled three times, for AVX-512, for AVX2 with FMA and for the
//! baseline instruction set, and the widest the processor has is chosen at run time.
//! No variant fuses a multiply and an add (Rust never contracts them), so all three give
//! the same bits.

use super::family::GaussianComponents;
use super::gating::{Gating, GatingStats};
use rayon::prelude::*;

/// Rows per tile: the scratch of a tile stays in the core's own caches.
pub const TILE: usize = 256;
/// Rows per parallel task (and per partial sum).
pub const TASK_ROWS: usize = TILE * 32;

/// Sums of the Gaussian M-step, taken around coefficients `at`: with v = c·τ and
/// residuals r = y − B_at′z, the update is B = B_at + Δ with (Σ v z z′) Δ = Σ v z r′,
/// and the scatter about the new means is Σ v r r′ − (Σ v z r′)′ Δ, exactly.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct GaussianStats {
    /// Clusters, design columns, indicators.
    pub g: usize,
    /// Design columns.
    pub q: usize,
    /// Indicators.
    pub d: usize,
    /// Σ τ per cluster (effective rows, unweighted).
    pub rows: Vec<f64>,
    /// Σ v per cluster.
    pub weight: Vec<f64>,
    /// Σ v z z′, q×q per cluster, lower triangle filled.
    pub zz: Vec<f64>,
    /// Σ v z r′, q×d per cluster.
    pub zr: Vec<f64>,
    /// Σ v r r′, d×d per cluster, lower triangle filled.
    pub rr: Vec<f64>,
    /// The coefficients the residuals were taken from (`coef` layout).
    pub at: Vec<f64>,
}

impl GaussianStats {
    fn zeros(g: usize, q: usize, d: usize, at: &[f64]) -> GaussianStats {
        GaussianStats {
            g,
            q,
            d,
            rows: vec![0.0; g],
            weight: vec![0.0; g],
            zz: vec![0.0; g * q * q],
            zr: vec![0.0; g * q * d],
            rr: vec![0.0; g * d * d],
            at: at.to_vec(),
        }
    }

    fn add(&mut self, other: &GaussianStats) {
        for (a, b) in [
            (&mut self.rows, &other.rows),
            (&mut self.weight, &other.weight),
            (&mut self.zz, &other.zz),
            (&mut self.zr, &other.zr),
            (&mut self.rr, &other.rr),
        ] {
            add_into(a, b);
        }
    }
}

impl GatingStats {
    fn zeros(g: usize, p: usize) -> GatingStats {
        let mut s = GatingStats::default();
        s.reset(g, p);
        s
    }

    fn add(&mut self, other: &GatingStats) {
        add_into(&mut self.score, &other.score);
        add_into(&mut self.neg_hessian, &other.neg_hessian);
    }
}

fn add_into(a: &mut [f64], b: &[f64]) {
    for (x, y) in a.iter_mut().zip(b) {
        *x += y;
    }
}

/// The arrays a pass reads, row-major as [`super::FitData`] holds them.
#[derive(Clone, Copy)]
pub struct Rows<'a> {
    /// Rows.
    pub n: usize,
    /// Case weights.
    pub weights: &'a [f64],
    /// Continuous indicators, n×d.
    pub y: &'a [f64],
    /// Indicators.
    pub d: usize,
    /// Gaussian design, n×q.
    pub z: &'a [f64],
    /// Its columns.
    pub q: usize,
    /// Gating design, n×p.
    pub w: &'a [f64],
    /// Its columns.
    pub p: usize,
}

/// What the E-step pass needs of the Gaussian block, prepared once per pass.
struct GaussianPass<'a> {
    coef: &'a [f64],
    /// Inverse of each cluster's lower Cholesky factor, d×d row-major.
    inv_chol: Vec<f64>,
    /// −½(d ln 2π + ln det Σ_k).
    base: Vec<f64>,
}

/// The cluster log-probabilities: a logit on the gating design or constants.
enum Prior<'a> {
    Logit(&'a [f64]),
    Constant(Vec<f64>),
}

struct Pass<'a> {
    rows: Rows<'a>,
    g: usize,
    gaussian: Option<GaussianPass<'a>>,
    prior: Prior<'a>,
    /// Whether `tau` already holds log-densities of other blocks to add to.
    has_base: bool,
    want_gaussian: bool,
    want_gating: bool,
}

/// What one task (or the whole pass) sums.
struct Partial {
    loglik: f64,
    gaussian: Option<GaussianStats>,
    gating: Option<GatingStats>,
}

impl Partial {
    fn add(&mut self, other: Partial) {
        self.loglik += other.loglik;
        if let (Some(a), Some(b)) = (&mut self.gaussian, &other.gaussian) {
            a.add(b);
        }
        if let (Some(a), Some(b)) = (&mut self.gating, &other.gating) {
            a.add(b);
        }
    }
}

/// Column-major scratch of one tile.
struct Scratch {
    y: Vec<f64>,
    z: Vec<f64>,
    w: Vec<f64>,
    c: Vec<f64>,
    /// Residuals, `res[(k * d + j) * TILE + i]`.
    res: Vec<f64>,
    /// Log joint per cluster, then responsibilities.
    lp: Vec<f64>,
    /// Gating linear predictors, then cluster probabilities.
    eta: Vec<f64>,
    /// Products w_a w_b (b ≤ a) of the gating columns.
    ww: Vec<f64>,
    lse: Vec<f64>,
    lse_eta: Vec<f64>,
    sum: Vec<f64>,
    u: Vec<f64>,
    quad: Vec<f64>,
    v: Vec<f64>,
    vz: Vec<f64>,
    s: Vec<f64>,
}

impl Scratch {
    fn new(g: usize, d: usize, q: usize, p: usize) -> Scratch {
        let v = |k: usize| vec![0.0; k * TILE];
        Scratch {
            y: v(d),
            z: v(q),
            w: v(p),
            c: v(1),
            res: v(g * d),
            lp: v(g),
            eta: v(g),
            ww: v(p * (p + 1) / 2),
            lse: v(1),
            lse_eta: v(1),
            sum: v(1),
            u: v(1),
            quad: v(1),
            v: v(1),
            vz: v(q.max(d)),
            s: v(1),
        }
    }
}

/// Copy rows (row-major, `width` columns) into column-major tile scratch.
#[inline(always)]
fn transpose(rows: &[f64], width: usize, out: &mut [f64]) {
    for (i, row) in rows.chunks_exact(width).enumerate() {
        for (j, x) in row.iter().enumerate() {
            out[j * TILE + i] = *x;
        }
    }
}

/// Σ a_i b_i in eight lanes, added in a fixed order.
#[inline(always)]
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    let b = &b[..a.len()];
    let mut acc = [0.0f64; 8];
    let mut ca = a.chunks_exact(8);
    let mut cb = b.chunks_exact(8);
    for (x, y) in (&mut ca).zip(&mut cb) {
        for l in 0..8 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut tail = 0.0;
    for (x, y) in ca.remainder().iter().zip(cb.remainder()) {
        tail += x * y;
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + tail
}

/// Σ a_i in eight lanes, added in a fixed order.
#[inline(always)]
fn total(a: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    let mut ca = a.chunks_exact(8);
    for x in &mut ca {
        for l in 0..8 {
            acc[l] += x[l];
        }
    }
    let tail: f64 = ca.remainder().iter().sum();
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + tail
}

/// e^x to about one unit in the last place, written so that loops over it vectorise.
///
/// x = n ln 2 + r with |r| ≤ ln 2 / 2 (Cody & Waite's two-part ln 2), e^r by its Taylor
/// polynomial to degree 13 (truncation below 1e-17), and 2^n put into the exponent bits.
/// Results below e^−708.39 are 0 (the subnormal range is dropped).
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    const SHIFT: f64 = 6_755_399_441_055_744.0; // 1.5 · 2^52: adding it rounds to an integer
    const LN2_HI: f64 = 6.931_471_803_691_238_2e-1;
    const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
    let xc = if x < -708.0 {
        -708.0
    } else if x > 709.0 {
        709.0
    } else {
        x
    };
    let t = xc * std::f64::consts::LOG2_E + SHIFT;
    let n = t - SHIFT;
    let r = (xc - n * LN2_HI) - n * LN2_LO;
    const C: [f64; 14] = [
        1.0,
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5040.0,
        1.0 / 40320.0,
        1.0 / 362_880.0,
        1.0 / 3_628_800.0,
        1.0 / 39_916_800.0,
        1.0 / 479_001_600.0,
        1.0 / 6_227_020_800.0,
    ];
    let mut poly = C[13];
    for c in C[..13].iter().rev() {
        poly = poly * r + c;
    }
    let k = (t.to_bits() as i64).wrapping_sub(SHIFT.to_bits() as i64);
    let scale = f64::from_bits(((k + 1023) as u64) << 52);
    let y = poly * scale;
    if x < -708.39 {
        0.0
    } else if x > 709.78 {
        f64::INFINITY
    } else {
        y
    }
}

/// Softmax over clusters of the column-major `x` (g runs of `TILE`, first `m` rows used):
/// x becomes probabilities, `sum` the sums of the shifted exponentials and `lse` the log
/// sums. A row whose entries are all −∞ gets probabilities NaN and log sum −∞.
#[inline(always)]
fn softmax_columns(x: &mut [f64], g: usize, m: usize, lse: &mut [f64], sum: &mut [f64]) {
    let (lse, sum) = (&mut lse[..m], &mut sum[..m]);
    lse.copy_from_slice(&x[..m]);
    for k in 1..g {
        for (a, b) in lse.iter_mut().zip(&x[k * TILE..k * TILE + m]) {
            *a = if *b > *a { *b } else { *a };
        }
    }
    for a in lse.iter_mut() {
        // Shift by 0 when every entry is −∞, so that the sum is 0 and its log −∞.
        *a = if *a == f64::NEG_INFINITY { 0.0 } else { *a };
    }
    sum.fill(0.0);
    for k in 0..g {
        for ((e, s), mx) in x[k * TILE..k * TILE + m].iter_mut().zip(sum.iter_mut()).zip(lse.iter()) {
            *e = exp(*e - mx);
            *s += *e;
        }
    }
    for k in 0..g {
        for (e, s) in x[k * TILE..k * TILE + m].iter_mut().zip(sum.iter()) {
            *e /= s;
        }
    }
    for (a, s) in lse.iter_mut().zip(sum.iter()) {
        *a += s.ln();
    }
}

/// Add the gating sums of one tile: weights `c`, responsibilities `tau` (column-major, g
/// runs), cluster probabilities `pi` (same layout), row totals of τ `s` (None: all 1).
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn add_gating(
    st: &mut GatingStats,
    g: usize,
    p: usize,
    m: usize,
    c: &[f64],
    tau: &[f64],
    pi: &[f64],
    s: Option<&[f64]>,
    w: &[f64],
    ww: &[f64],
    h: &mut [f64],
) {
    let mm = (g - 1) * p;
    let h = &mut h[..m];
    for k in 1..g {
        let (tk, pk) = (&tau[k * TILE..k * TILE + m], &pi[k * TILE..k * TILE + m]);
        match s {
            None => {
                for (((hv, cv), t), pv) in h.iter_mut().zip(c).zip(tk).zip(pk) {
                    *hv = cv * (t - pv);
                }
            }
            Some(s) => {
                for ((((hv, cv), t), pv), sv) in h.iter_mut().zip(c).zip(tk).zip(pk).zip(s) {
                    *hv = cv * (t - sv * pv);
                }
            }
        }
        for a in 0..p {
            st.score[(k - 1) * p + a] += dot(h, &w[a * TILE..]);
        }
        for l in 1..=k {
            let pl = &pi[l * TILE..l * TILE + m];
            let delta = if k == l { 1.0 } else { 0.0 };
            match s {
                None => {
                    for (((hv, cv), pkv), plv) in h.iter_mut().zip(c).zip(pk).zip(pl) {
                        *hv = cv * pkv * (delta - plv);
                    }
                }
                Some(s) => {
                    for ((((hv, cv), pkv), plv), sv) in h.iter_mut().zip(c).zip(pk).zip(pl).zip(s) {
                        *hv = cv * sv * pkv * (delta - plv);
                    }
                }
            }
            let mut ab = 0;
            for a in 0..p {
                for b in 0..=a {
                    let x = dot(h, &ww[ab * TILE..]);
                    ab += 1;
                    let (r, col) = ((k - 1) * p + a, (l - 1) * p + b);
                    st.neg_hessian[r * mm + col] += x;
                    if k != l && a != b {
                        // The block w w′ is symmetric: (a, b) and (b, a) share the sum.
                        let (r, col) = ((k - 1) * p + b, (l - 1) * p + a);
                        st.neg_hessian[r * mm + col] += x;
                    }
                }
            }
        }
    }
}

/// Products w_a w_b for b ≤ a, column-major.
#[inline(always)]
fn gating_products(w: &[f64], p: usize, m: usize, ww: &mut [f64]) {
    let mut ab = 0;
    for a in 0..p {
        for b in 0..=a {
            for ((o, x), y) in ww[ab * TILE..ab * TILE + m]
                .iter_mut()
                .zip(&w[a * TILE..a * TILE + m])
                .zip(&w[b * TILE..b * TILE + m])
            {
                *o = x * y;
            }
            ab += 1;
        }
    }
}

/// Add the Gaussian sums of one tile from responsibilities (column-major) and the
/// residuals in scratch.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn add_gaussian(
    st: &mut GaussianStats,
    g: usize,
    m: usize,
    c: &[f64],
    z: &[f64],
    res: &[f64],
    tau: &[f64],
    v: &mut [f64],
    vz: &mut [f64],
) {
    let (q, d) = (st.q, st.d);
    let (v, vz) = (&mut v[..m], &mut vz[..m]);
    for k in 0..g {
        let tk = &tau[k * TILE..k * TILE + m];
        for ((vv, cv), t) in v.iter_mut().zip(&c[..m]).zip(tk) {
            *vv = cv * t;
        }
        st.rows[k] += total(tk);
        st.weight[k] += total(v);
        // z_0 = 1: its products are v itself.
        for a in 0..q {
            if a > 0 {
                for ((o, vv), za) in vz.iter_mut().zip(v.iter()).zip(&z[a * TILE..a * TILE + m]) {
                    *o = vv * za;
                }
            }
            let vza: &[f64] = if a == 0 { v } else { vz };
            for b in 0..=a {
                let x = if b == 0 { total(vza) } else { dot(vza, &z[b * TILE..]) };
                st.zz[(k * q + a) * q + b] += x;
            }
            for j in 0..d {
                st.zr[(k * q + a) * d + j] += dot(vza, &res[(k * d + j) * TILE..]);
            }
        }
        for a in 0..d {
            let ra = &res[(k * d + a) * TILE..(k * d + a) * TILE + m];
            for ((o, vv), x) in vz.iter_mut().zip(v.iter()).zip(ra) {
                *o = vv * x;
            }
            for b in 0..=a {
                st.rr[(k * d + a) * d + b] += dot(vz, &res[(k * d + b) * TILE..]);
            }
        }
    }
}

/// Residuals y − B_k′z of every cluster into scratch, from coefficients `coef`.
#[inline(always)]
fn residuals(coef: &[f64], g: usize, q: usize, d: usize, m: usize, sc: &mut Scratch) {
    for k in 0..g {
        for j in 0..d {
            let r = &mut sc.res[(k * d + j) * TILE..(k * d + j) * TILE + m];
            let b0 = coef[k * q * d + j];
            for (o, y) in r.iter_mut().zip(&sc.y[j * TILE..j * TILE + m]) {
                *o = y - b0;
            }
            for a in 1..q {
                let b = coef[(k * q + a) * d + j];
                for (o, za) in r.iter_mut().zip(&sc.z[a * TILE..a * TILE + m]) {
                    *o -= b * za;
                }
            }
        }
    }
}

/// One tile of the E-step: rows `start..start + m`, `tau` their n×G rows.
#[inline(always)]
fn e_step_tile(pass: &Pass, start: usize, tau: &mut [f64], sc: &mut Scratch, part: &mut Partial) {
    let (g, r) = (pass.g, &pass.rows);
    let m = tau.len() / g;
    let end = start + m;
    sc.c[..m].copy_from_slice(&r.weights[start..end]);
    for k in 0..g {
        let lp = &mut sc.lp[k * TILE..k * TILE + m];
        if pass.has_base {
            for (o, t) in lp.iter_mut().zip(tau[k..].iter().step_by(g)) {
                *o = *t;
            }
        } else {
            lp.fill(0.0);
        }
    }
    if let Some(gp) = &pass.gaussian {
        let (d, q) = (r.d, r.q);
        transpose(&r.y[start * d..end * d], d, &mut sc.y);
        transpose(&r.z[start * q..end * q], q, &mut sc.z);
        residuals(gp.coef, g, q, d, m, sc);
        for k in 0..g {
            let l = &gp.inv_chol[k * d * d..(k + 1) * d * d];
            let quad = &mut sc.quad[..m];
            quad.fill(0.0);
            for a in 0..d {
                let u = &mut sc.u[..m];
                u.fill(0.0);
                for b in 0..=a {
                    let lab = l[a * d + b];
                    for (o, x) in u.iter_mut().zip(&sc.res[(k * d + b) * TILE..(k * d + b) * TILE + m]) {
                        *o += lab * x;
                    }
                }
                for (qv, uv) in quad.iter_mut().zip(u.iter()) {
                    *qv += uv * uv;
                }
            }
            let base = gp.base[k];
            for (o, qv) in sc.lp[k * TILE..k * TILE + m].iter_mut().zip(quad.iter()) {
                *o += base - 0.5 * qv;
            }
        }
    }
    let logit = match &pass.prior {
        Prior::Logit(gamma) => {
            let p = r.p;
            transpose(&r.w[start * p..end * p], p, &mut sc.w);
            sc.eta[..m].fill(0.0);
            for k in 1..g {
                let coef = &gamma[(k - 1) * p..k * p];
                let eta = &mut sc.eta[k * TILE..k * TILE + m];
                eta.fill(0.0);
                for (a, ca) in coef.iter().enumerate() {
                    for (o, x) in eta.iter_mut().zip(&sc.w[a * TILE..a * TILE + m]) {
                        *o += ca * x;
                    }
                }
                for (o, e) in sc.lp[k * TILE..k * TILE + m].iter_mut().zip(eta.iter()) {
                    *o += e;
                }
            }
            softmax_columns(&mut sc.eta, g, m, &mut sc.lse_eta, &mut sc.sum);
            true
        }
        Prior::Constant(log_pi) => {
            for (k, l) in log_pi.iter().enumerate() {
                for o in sc.lp[k * TILE..k * TILE + m].iter_mut() {
                    *o += l;
                }
            }
            false
        }
    };
    softmax_columns(&mut sc.lp, g, m, &mut sc.lse, &mut sc.sum);
    if logit {
        for (a, b) in sc.lse[..m].iter_mut().zip(&sc.lse_eta[..m]) {
            *a -= b;
        }
    }
    part.loglik += dot(&sc.c[..m], &sc.lse);
    for (i, row) in tau.chunks_exact_mut(g).enumerate() {
        for (k, t) in row.iter_mut().enumerate() {
            *t = sc.lp[k * TILE + i];
        }
    }
    if let (Some(st), true) = (part.gating.as_mut(), pass.want_gating) {
        let p = r.p;
        gating_products(&sc.w, p, m, &mut sc.ww);
        add_gating(st, g, p, m, &sc.c, &sc.lp, &sc.eta, None, &sc.w, &sc.ww, &mut sc.s);
    }
    if let (Some(st), true) = (part.gaussian.as_mut(), pass.want_gaussian) {
        add_gaussian(st, g, m, &sc.c, &sc.z, &sc.res, &sc.lp, &mut sc.v, &mut sc.vz);
    }
}

/// Run `task` over tasks of [`TASK_ROWS`] rows (with their n×`g` rows of `tau`), in
/// parallel when there is more than one, and add the partial sums in task order.
fn over_tasks<F>(n: usize, g: usize, tau: &mut [f64], task: F) -> Partial
where
    F: Fn(usize, &mut [f64]) -> Partial + Sync,
{
    assert_eq!(tau.len(), n * g);
    let parts: Vec<Partial> = if n <= TASK_ROWS {
        vec![task(0, tau)]
    } else {
        tau.par_chunks_mut(TASK_ROWS * g)
            .enumerate()
            .map(|(t, chunk)| task(t * TASK_ROWS, chunk))
            .collect()
    };
    let mut parts = parts.into_iter();
    let mut first = parts.next().expect("at least one task");
    for p in parts {
        first.add(p);
    }
    first
}

macro_rules! widest {
    ($(#[$doc:meta])* fn $name:ident($($arg:ident: $ty:ty),*) $(-> $ret:ty)? = $body:ident) => {
        $(#[$doc])*
        fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx512dq,avx512vl,avx2,fma")]
                unsafe fn wide($($arg: $ty),*) $(-> $ret)? {
                    $body($($arg),*)
                }
                #[target_feature(enable = "avx2,fma")]
                unsafe fn middle($($arg: $ty),*) $(-> $ret)? {
                    $body($($arg),*)
                }
                if std::arch::is_x86_feature_detected!("avx512f")
                    && std::arch::is_x86_feature_detected!("avx512dq")
                    && std::arch::is_x86_feature_detected!("avx512vl")
                {
                    // SAFETY: the features `wide` was compiled for are present.
                    return unsafe { wide($($arg),*) };
                }
                if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma") {
                    // SAFETY: the features `middle` was compiled for are present.
                    return unsafe { middle($($arg),*) };
                }
            }
            $body($($arg),*)
        }
    };
}

#[inline(always)]
fn e_step_task_body(pass: &Pass, start: usize, tau: &mut [f64]) -> Partial {
    let r = &pass.rows;
    let g = pass.g;
    let mut sc = Scratch::new(g, r.d, r.q, if matches!(pass.prior, Prior::Logit(_)) { r.p } else { 0 });
    let mut part = Partial {
        loglik: 0.0,
        gaussian: (pass.want_gaussian)
            .then(|| GaussianStats::zeros(g, r.q, r.d, pass.gaussian.as_ref().map_or(&[][..], |gp| gp.coef))),
        gating: pass.want_gating.then(|| GatingStats::zeros(g, r.p)),
    };
    for (t, tile) in tau.chunks_mut(TILE * g).enumerate() {
        e_step_tile(pass, start + t * TILE, tile, &mut sc, &mut part);
    }
    part
}

widest!(
    /// One E-step task in the widest instruction set available.
    fn e_step_task(pass: &Pass, start: usize, tau: &mut [f64]) -> Partial = e_step_task_body
);

/// The E-step over all rows: adds the Gaussian log-densities (if any) and the log
/// cluster probabilities to `tau` (which holds the other blocks' log-densities when
/// `has_base`, and is overwritten otherwise), turns rows into responsibilities and
/// returns the weighted log-likelihood. Fills the gating sums when asked and the gating
/// network is a logit, and the Gaussian sums when asked and there is a Gaussian block.
pub fn e_step(
    rows: Rows,
    gaussian: Option<&GaussianComponents>,
    gating: &Gating,
    has_base: bool,
    tau: &mut [f64],
    gating_stats: Option<&mut GatingStats>,
    gaussian_stats: Option<&mut GaussianStats>,
) -> f64 {
    let g = gating.clusters();
    let prior = match gating {
        Gating::Logit { gamma, .. } => Prior::Logit(gamma),
        other => {
            let mut lp = vec![0.0; g];
            other.log_priors(&[], &mut lp);
            Prior::Constant(lp)
        }
    };
    let want_gating = gating_stats.is_some() && matches!(prior, Prior::Logit(_));
    let want_gaussian = gaussian_stats.is_some() && gaussian.is_some();
    let pass = Pass {
        rows,
        g,
        gaussian: gaussian.map(|gc| GaussianPass {
            coef: &gc.coef,
            inv_chol: gc.inverse_cholesky(),
            base: gc.log_density_constants(),
        }),
        prior,
        has_base,
        want_gaussian,
        want_gating,
    };
    let total = over_tasks(rows.n, g, tau, |start, chunk| e_step_task(&pass, start, chunk));
    if let (Some(out), Some(s)) = (gating_stats, total.gating) {
        *out = s;
    }
    if let (Some(out), Some(s)) = (gaussian_stats, total.gaussian) {
        *out = s;
    }
    total.loglik
}

#[inline(always)]
fn gaussian_stats_task_body(rows: &Rows, g: usize, at: &[f64], start: usize, tau: &[f64]) -> Partial {
    let (d, q) = (rows.d, rows.q);
    let mut sc = Scratch::new(g, d, q, 0);
    let mut st = GaussianStats::zeros(g, q, d, at);
    let mut t_cols = vec![0.0; g * TILE];
    for (t, tile) in tau.chunks(TILE * g).enumerate() {
        let s = start + t * TILE;
        let m = tile.len() / g;
        sc.c[..m].copy_from_slice(&rows.weights[s..s + m]);
        transpose(&rows.y[s * d..(s + m) * d], d, &mut sc.y);
        transpose(&rows.z[s * q..(s + m) * q], q, &mut sc.z);
        transpose(tile, g, &mut t_cols);
        residuals(at, g, q, d, m, &mut sc);
        add_gaussian(&mut st, g, m, &sc.c, &sc.z, &sc.res, &t_cols, &mut sc.v, &mut sc.vz);
    }
    Partial {
        loglik: 0.0,
        gaussian: Some(st),
        gating: None,
    }
}

widest!(
    /// One task of [`gaussian_stats`] in the widest instruction set available.
    fn gaussian_stats_task(rows: &Rows, g: usize, at: &[f64], start: usize, tau: &[f64]) -> Partial = gaussian_stats_task_body
);

/// The Gaussian M-step sums from given responsibilities (n×G), around coefficients `at`.
pub fn gaussian_stats(rows: Rows, g: usize, at: &[f64], tau: &[f64]) -> GaussianStats {
    let total = over_tasks_read(rows.n, g, tau, |start, chunk| {
        gaussian_stats_task(&rows, g, at, start, chunk)
    });
    total.gaussian.expect("the Gaussian pass sums Gaussian statistics")
}

/// As [`over_tasks`] for passes that only read `tau`.
fn over_tasks_read<F>(n: usize, g: usize, tau: &[f64], task: F) -> Partial
where
    F: Fn(usize, &[f64]) -> Partial + Sync,
{
    assert_eq!(tau.len(), n * g);
    let parts: Vec<Partial> = if n <= TASK_ROWS {
        vec![task(0, tau)]
    } else {
        tau.par_chunks(TASK_ROWS * g)
            .enumerate()
            .map(|(t, chunk)| task(t * TASK_ROWS, chunk))
            .collect()
    };
    let mut parts = parts.into_iter();
    let mut first = parts.next().expect("at least one task");
    for p in parts {
        first.add(p);
    }
    first
}

#[inline(always)]
fn logit_task_body(
    w: &[f64],
    p: usize,
    tau: &[f64],
    g: usize,
    weights: &[f64],
    gamma: &[f64],
    derivatives: bool,
    start: usize,
) -> Partial {
    let mut sc = Scratch::new(g, 0, 0, p);
    let mut t_cols = vec![0.0; g * TILE];
    let mut part = Partial {
        loglik: 0.0,
        gaussian: None,
        gating: derivatives.then(|| GatingStats::zeros(g, p)),
    };
    for (t, tile) in tau.chunks(TILE * g).enumerate() {
        let s = start + t * TILE;
        let m = tile.len() / g;
        sc.c[..m].copy_from_slice(&weights[s..s + m]);
        transpose(&w[s * p..(s + m) * p], p, &mut sc.w);
        transpose(tile, g, &mut t_cols);
        sc.eta[..m].fill(0.0);
        for k in 1..g {
            let eta = &mut sc.eta[k * TILE..k * TILE + m];
            eta.fill(0.0);
            for (a, ca) in gamma[(k - 1) * p..k * p].iter().enumerate() {
                for (o, x) in eta.iter_mut().zip(&sc.w[a * TILE..a * TILE + m]) {
                    *o += ca * x;
                }
            }
        }
        // Objective Σ c Σ_k τ_k log π_k = Σ c (Σ_k τ_k η_k − s lse(η)), s = Σ_k τ_k.
        let row_tau = &mut sc.s[..m];
        row_tau.fill(0.0);
        let lin = &mut sc.u[..m];
        lin.fill(0.0);
        for k in 0..g {
            for ((o, l), (t, e)) in row_tau.iter_mut().zip(lin.iter_mut()).zip(
                t_cols[k * TILE..k * TILE + m]
                    .iter()
                    .zip(&sc.eta[k * TILE..k * TILE + m]),
            ) {
                *o += t;
                *l += t * e;
            }
        }
        softmax_columns(&mut sc.eta, g, m, &mut sc.lse_eta, &mut sc.sum);
        for ((l, s), e) in lin.iter_mut().zip(row_tau.iter()).zip(&sc.lse_eta[..m]) {
            *l -= s * e;
        }
        part.loglik += dot(&sc.c[..m], lin);
        if let Some(st) = part.gating.as_mut() {
            gating_products(&sc.w, p, m, &mut sc.ww);
            add_gating(
                st,
                g,
                p,
                m,
                &sc.c,
                &t_cols,
                &sc.eta,
                Some(&sc.s[..m]),
                &sc.w,
                &sc.ww,
                &mut sc.quad,
            );
        }
    }
    part
}

widest!(
    /// One task of [`logit_pass`] in the widest instruction set available.
    fn logit_task(w: &[f64], p: usize, tau: &[f64], g: usize, weights: &[f64], gamma: &[f64], derivatives: bool, start: usize) -> Partial = logit_task_body
);

/// The unpenalised multinomial-logit objective Σ c Σ_k τ_k log π_k at `gamma`, and with
/// `derivatives` its score and negative Hessian (row totals of τ need not be 1).
pub fn logit_pass(
    w: &[f64],
    p: usize,
    tau: &[f64],
    g: usize,
    weights: &[f64],
    gamma: &[f64],
    derivatives: bool,
) -> (f64, Option<GatingStats>) {
    let n = weights.len();
    let total = over_tasks_read(n, g, tau, |start, chunk| {
        logit_task(w, p, chunk, g, weights, gamma, derivatives, start)
    });
    (total.loglik, total.gating)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exp_is_within_two_units_in_the_last_place() {
        let mut worst = 0.0f64;
        let mut x = -708.0;
        while x < 709.0 {
            let (a, b) = (exp(x), x.exp());
            worst = worst.max(((a - b) / b).abs());
            x += 0.0137;
        }
        assert!(worst < 4.5e-16, "worst relative error {worst:e}");
        assert_eq!(exp(-800.0), 0.0);
        assert_eq!(exp(f64::NEG_INFINITY), 0.0);
        assert_eq!(exp(0.0), 1.0);
        assert!(exp(f64::NAN).is_nan());
        assert_eq!(exp(800.0), f64::INFINITY);
    }

    #[test]
    fn dot_matches_a_plain_sum() {
        let a: Vec<f64> = (0..37).map(|i| (i as f64 * 0.37).sin()).collect();
        let b: Vec<f64> = (0..37).map(|i| (i as f64 * 0.11).cos()).collect();
        let plain: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        assert!((dot(&a, &b) - plain).abs() < 1e-13);
        assert!((total(&a) - a.iter().sum::<f64>()).abs() < 1e-13);
    }
}
