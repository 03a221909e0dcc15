//! Passes over rows in fixed tiles: the E-step with the sums the next M-step needs, and
//! the multinomial-logit pass of the gating fit.
//!
//! Rows are cut into tiles of [`TILE`] rows. A tile's columns are copied into
//! column-major scratch (one contiguous run per column), so that every loop over rows is
//! a plain loop over slices that the compiler turns into vector instructions; sums over
//! rows use fixed independent lanes ([`dot`]) for the same reason. Tiles are grouped
//! into tasks of [`TASK_ROWS`] rows that rayon runs in parallel. Every task adds its tiles
//! in order and the task sums are added in task order, so results do not depend on the
//! number of threads. Scratch is allocated once per task, never inside a row loop.
//!
//! The kernels are compiled three times, for AVX-512, for AVX2 with FMA and for the
//! baseline instruction set, and the widest the processor has is chosen at run time.
//! Fused multiply-adds are written out as `f64::mul_add`, which is exactly rounded on every
//! instruction set, and Rust never fuses or reorders the other operations, so all three
//! give the same bits.

use super::family::gaussian::GaussianComponents;
use super::gating::{Gating, GatingStats};
use rayon::prelude::*;

/// Rows per tile: the scratch of a tile stays in the core's own caches.
pub const TILE: usize = 256;
/// Rows per parallel task (and per partial sum).
pub const TASK_ROWS: usize = TILE * 32;

/// What a pass over rows reads: the case weights and the gating design, and for the
/// Gaussian kernel its indicators and regression design (empty without one).
#[derive(Debug, Clone, Copy)]
pub struct PassRows<'a> {
    /// Rows.
    pub n: usize,
    /// Case weights (length n).
    pub weights: &'a [f64],
    /// Gating design, n×p (intercept first).
    pub w: &'a [f64],
    /// Gating design columns.
    pub p: usize,
    /// Continuous indicators, n×d (empty without a Gaussian block).
    pub y: &'a [f64],
    /// Continuous indicators (0 without a Gaussian block).
    pub d: usize,
    /// The Gaussian block's design, n×q (intercept first).
    pub z: &'a [f64],
    /// Its columns.
    pub q: usize,
}

/// Whether `tau` holds the other blocks' log-densities when a pass begins.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Base {
    /// It does not: the pass overwrites it.
    Empty,
    /// It does: the pass adds to them.
    Written,
}

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
        add_into(&mut self.cluster_weight, &other.cluster_weight);
    }
}

fn add_into(a: &mut [f64], b: &[f64]) {
    for (x, y) in a.iter_mut().zip(b) {
        *x += y;
    }
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
    rows: PassRows<'a>,
    g: usize,
    gaussian: Option<GaussianPass<'a>>,
    prior: Prior<'a>,
    /// Whether `tau` already holds log-densities of other blocks to add to.
    has_base: bool,
    want_gaussian: bool,
    want_gating: bool,
    /// Whether the gating sums include the negative Hessian (else the score alone).
    gating_hessian: bool,
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
    /// (g, d, q, p) it was made for.
    sizes: (usize, usize, usize, usize),
    y: Vec<f64>,
    z: Vec<f64>,
    w: Vec<f64>,
    /// Residuals, `res[(k * d + j) * TILE + i]`.
    res: Vec<f64>,
    /// Log joint per cluster, then responsibilities.
    lp: Vec<f64>,
    /// Gating linear predictors, then cluster probabilities.
    eta: Vec<f64>,
    /// Products w_a w_b (b ≤ a) of the gating columns.
    ww: Vec<f64>,
    /// Their weighted sums.
    hsum: Vec<f64>,
    lse: Vec<f64>,
    lse_eta: Vec<f64>,
    sum: Vec<f64>,
    u: Vec<f64>,
    quad: Vec<f64>,
    v: Vec<f64>,
    vz: Vec<f64>,
    s: Vec<f64>,
}

thread_local! {
    /// The scratch of the last task run on this thread, kept for the next one: making
    /// it (allocated and zeroed) for every task cost about a seventh of an EM iteration
    /// at 10^4 rows, and a start on fewer than `TASK_ROWS` rows makes one every pass.
    static SPARE: std::cell::RefCell<Option<Scratch>> = const { std::cell::RefCell::new(None) };
}

impl Scratch {
    /// Scratch for these sizes: this thread's spare when its sizes match, else new.
    /// A spare holds what its last tile left; that is harmless because every kernel
    /// writes the part of a run it reads before reading it, as the second tile of a
    /// task already requires. (A nested task on the same thread finds no spare and
    /// makes its own.)
    fn take(g: usize, d: usize, q: usize, p: usize) -> Scratch {
        SPARE
            .with(|s| s.borrow_mut().take())
            .filter(|sc| sc.sizes == (g, d, q, p))
            .unwrap_or_else(|| Scratch::new(g, d, q, p))
    }

    /// Keep this scratch for the thread's next task.
    fn give_back(self) {
        SPARE.with(|s| *s.borrow_mut() = Some(self));
    }

    fn new(g: usize, d: usize, q: usize, p: usize) -> Scratch {
        let v = |k: usize| vec![0.0; k * TILE];
        Scratch {
            sizes: (g, d, q, p),
            y: v(d),
            z: v(q),
            w: v(p),
            res: v(g * d),
            lp: v(g),
            eta: v(g),
            ww: v(p * (p + 1) / 2),
            hsum: vec![0.0; p * (p + 1) / 2],
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

/// `$f::<W>(args)` for a run-time width `$w` from 1 to 8, else `$other`: the kernels
/// with a fixed width keep their rows in registers.
macro_rules! up_to_eight {
    ($w:expr, $f:ident($($a:expr),*), $other:expr) => {
        match $w {
            1 => $f::<1>($($a),*),
            2 => $f::<2>($($a),*),
            3 => $f::<3>($($a),*),
            4 => $f::<4>($($a),*),
            5 => $f::<5>($($a),*),
            6 => $f::<6>($($a),*),
            7 => $f::<7>($($a),*),
            8 => $f::<8>($($a),*),
            _ => $other,
        }
    };
}

/// Copy rows (row-major, `width` columns) into column-major tile scratch.
#[inline(always)]
fn transpose(rows: &[f64], width: usize, out: &mut [f64]) {
    up_to_eight!(width, transpose_fixed(rows, out), {
        if width > 0 {
            for (i, row) in rows.chunks_exact(width).enumerate() {
                for (j, x) in row.iter().enumerate() {
                    out[j * TILE + i] = *x;
                }
            }
        }
    })
}

#[inline(always)]
fn transpose_fixed<const W: usize>(rows: &[f64], out: &mut [f64]) {
    let m = rows.len() / W;
    let mut cols = out.chunks_exact_mut(TILE);
    let cols: [&mut [f64]; W] = std::array::from_fn(|_| &mut cols.next().expect("a run per column")[..m]);
    for (i, row) in rows.chunks_exact(W).enumerate() {
        for j in 0..W {
            cols[j][i] = row[j];
        }
    }
}

/// Copy column-major tile scratch (`width` runs) back into rows (row-major).
#[inline(always)]
fn untranspose(cols: &[f64], width: usize, rows: &mut [f64]) {
    up_to_eight!(width, untranspose_fixed(cols, rows), {
        for (i, row) in rows.chunks_exact_mut(width).enumerate() {
            for (j, x) in row.iter_mut().enumerate() {
                *x = cols[j * TILE + i];
            }
        }
    })
}

#[inline(always)]
fn untranspose_fixed<const W: usize>(cols: &[f64], rows: &mut [f64]) {
    let m = rows.len() / W;
    let mut runs = cols.chunks_exact(TILE);
    let runs: [&[f64]; W] = std::array::from_fn(|_| &runs.next().expect("a run per column")[..m]);
    for (i, row) in rows.chunks_exact_mut(W).enumerate() {
        for j in 0..W {
            row[j] = runs[j][i];
        }
    }
}

/// Independent partial sums in [`dot`] and [`total`]: enough to keep the adders busy.
const LANES: usize = 32;

/// Σ a_i b_i in `LANES` lanes, added in a fixed order.
///
/// Lane l sums the products of the entries i ≡ l (mod `LANES`); the lanes are held as
/// four arrays of eight so that the loop compiles to full-width vector instructions.
#[inline(always)]
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    let b = &b[..a.len()];
    let mut acc = [[0.0f64; 8]; 4];
    let full = a.len() - a.len() % LANES;
    for o in (0..full).step_by(LANES) {
        let x: &[f64; LANES] = a[o..o + LANES].try_into().expect("a run of lanes");
        let y: &[f64; LANES] = b[o..o + LANES].try_into().expect("a run of lanes");
        for (j, acc_j) in acc.iter_mut().enumerate() {
            for l in 0..8 {
                acc_j[l] = x[8 * j + l].mul_add(y[8 * j + l], acc_j[l]);
            }
        }
    }
    let mut tail = 0.0;
    for (x, y) in a[full..].iter().zip(&b[full..]) {
        tail += x * y;
    }
    fold_lanes(acc) + tail
}

/// `out[b] += Σ_i x_i y_b,i` for b < `count`, where y_b is the run `buf[b * TILE..]`
/// (first `x.len()` entries): each sum exactly as [`dot`] adds it, but two at a time, so
/// that x is read once for two runs.
#[inline(always)]
fn dots_into(x: &[f64], buf: &[f64], count: usize, out: &mut [f64]) {
    let mut b = 0;
    while b + 2 <= count {
        let n = x.len();
        let (y0, y1) = (&buf[b * TILE..b * TILE + n], &buf[(b + 1) * TILE..(b + 1) * TILE + n]);
        let mut acc0 = [[0.0f64; 8]; 4];
        let mut acc1 = [[0.0f64; 8]; 4];
        let full = n - n % LANES;
        for o in (0..full).step_by(LANES) {
            let xv: &[f64; LANES] = x[o..o + LANES].try_into().expect("a run of lanes");
            let v0: &[f64; LANES] = y0[o..o + LANES].try_into().expect("a run of lanes");
            let v1: &[f64; LANES] = y1[o..o + LANES].try_into().expect("a run of lanes");
            for j in 0..4 {
                for l in 0..8 {
                    acc0[j][l] = xv[8 * j + l].mul_add(v0[8 * j + l], acc0[j][l]);
                    acc1[j][l] = xv[8 * j + l].mul_add(v1[8 * j + l], acc1[j][l]);
                }
            }
        }
        let (acc0, acc1) = std::hint::black_box((acc0, acc1));
        let (mut t0, mut t1) = (0.0, 0.0);
        for ((a, p), q) in x[full..].iter().zip(&y0[full..]).zip(&y1[full..]) {
            t0 += a * p;
            t1 += a * q;
        }
        out[b] += fold_lanes(acc0) + t0;
        out[b + 1] += fold_lanes(acc1) + t1;
        b += 2;
    }
    if b < count {
        out[b] += dot(x, &buf[b * TILE..]);
    }
}

/// Eight lanes added in a fixed order.
#[inline(always)]
fn fold8(a: &[f64; 8]) -> f64 {
    ((a[0] + a[4]) + (a[1] + a[5])) + ((a[2] + a[6]) + (a[3] + a[7]))
}

/// Σ a_i in `LANES` lanes, added in a fixed order.
#[inline(always)]
fn total(a: &[f64]) -> f64 {
    let mut acc = [[0.0f64; 8]; 4];
    let full = a.len() - a.len() % LANES;
    for o in (0..full).step_by(LANES) {
        let x: &[f64; LANES] = a[o..o + LANES].try_into().expect("a run of lanes");
        for (j, acc_j) in acc.iter_mut().enumerate() {
            for l in 0..8 {
                acc_j[l] += x[8 * j + l];
            }
        }
    }
    let tail: f64 = a[full..].iter().sum();
    fold_lanes(acc) + tail
}

/// The `LANES` lanes (lane 8j + l in `acc[j][l]`) added pairwise, halving each time:
/// lane l gets lane l + w for w = 16, 8, 4, 2, 1 (a fixed order).
#[inline(always)]
fn fold_lanes(acc: [[f64; 8]; 4]) -> f64 {
    let mut h = [0.0f64; 8];
    for l in 0..8 {
        // w = 16, then w = 8.
        h[l] = (acc[0][l] + acc[2][l]) + (acc[1][l] + acc[3][l]);
    }
    // w = 4, 2, 1. Without the barrier the compiler vectorises the whole sum for these
    // last pairs, two lanes wide, and the loops that fill `acc` with it.
    let h = std::hint::black_box(h);
    ((h[0] + h[4]) + (h[2] + h[6])) + ((h[1] + h[5]) + (h[3] + h[7]))
}

/// e^x to about one unit in the last place, written so that loops over it vectorise.
///
/// x = n ln 2 + r with |r| ≤ ln 2 / 2 (Cody & Waite's two-part ln 2), e^r by its Taylor
/// polynomial to degree 13 (truncation below 1e-17), and 2^n put into the exponent bits.
/// Results below e^−708.39 are 0 (the subnormal range is dropped).
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    const SHIFT: f64 = 6_755_399_441_055_744.0; // 1.5 · 2^52: adding it rounds to an integer
                                                // ln 2 = LN2_HI + LN2_LO, the first with trailing zero bits so that n · LN2_HI is exact.
    const LN2_HI: f64 = f64::from_bits(0x3FE6_2E42_FEE0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3DEA_39EF_3579_3C76);
    let xc = x.clamp(-708.0, 709.0);
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
        poly = poly.mul_add(r, *c);
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

/// ln x for positive normal x (0 gives −∞, NaN and negative x NaN, +∞ gives +∞), to about
/// one unit in the last place, written so that loops over it vectorise.
///
/// x = 2^e m with m in [√½, √2), and ln m = 2 atanh s = 2(s + s³/3 + … + s²¹/21) with
/// s = (m − 1)/(m + 1), |s| ≤ 0.172 (truncation below 1e-18).
#[inline(always)]
pub fn ln(x: f64) -> f64 {
    const LN2_HI: f64 = f64::from_bits(0x3FE6_2E42_FEE0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3DEA_39EF_3579_3C76);
    let bits = x.to_bits();
    let e = ((bits >> 52) & 0x7ff) as i64 - 1023;
    let m = f64::from_bits((bits & 0x000F_FFFF_FFFF_FFFF) | 0x3FF0_0000_0000_0000);
    let big = m > std::f64::consts::SQRT_2;
    let m = if big { 0.5 * m } else { m };
    let e = (if big { e + 1 } else { e }) as f64;
    let s = (m - 1.0) / (m + 1.0);
    let s2 = s * s;
    let mut poly: f64 = 1.0 / 21.0;
    for c in [19.0, 17.0, 15.0, 13.0, 11.0, 9.0, 7.0, 5.0, 3.0, 1.0] {
        poly = poly.mul_add(s2, 1.0 / c);
    }
    let y = e * LN2_HI + (2.0 * s * poly + e * LN2_LO);
    if x == 0.0 {
        f64::NEG_INFINITY
    } else if !(x > 0.0) {
        f64::NAN
    } else if x == f64::INFINITY {
        x
    } else {
        y
    }
}

/// Softmax over clusters of the column-major `x` (g runs of `TILE`, first `m` rows used):
/// x becomes probabilities and `lse` the log sums of the exponentials (`sum` is scratch).
/// A row whose entries are all −∞ gets probabilities NaN and log sum −∞.
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
    for (a, s) in lse.iter_mut().zip(sum.iter_mut()) {
        *a += ln(*s);
        // One division per row; the probabilities are products with it.
        *s = 1.0 / *s;
    }
    for k in 0..g {
        for (e, s) in x[k * TILE..k * TILE + m].iter_mut().zip(sum.iter()) {
            *e *= s;
        }
    }
}

/// Add the gating sums of one tile: weights `c`, responsibilities `tau` (column-major, g
/// runs), cluster probabilities `pi` (same layout), row totals of τ `s` (None: all 1).
/// The negative Hessian only when `hessian`; the score always.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn add_gating(
    st: &mut GatingStats,
    hessian: bool,
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
    hsum: &mut [f64],
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
        dots_into(h, w, p, &mut st.score[(k - 1) * p..]);
        if !hessian {
            continue;
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
            let pairs = p * (p + 1) / 2;
            hsum[..pairs].fill(0.0);
            dots_into(h, ww, pairs, hsum);
            let mut ab = 0;
            for a in 0..p {
                for b in 0..=a {
                    let x = hsum[ab];
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
    if q == 1 {
        let done = match d {
            1 => add_gaussian_plain::<1>(st, g, &c[..m], res, tau),
            2 => add_gaussian_plain::<2>(st, g, &c[..m], res, tau),
            3 => add_gaussian_plain::<3>(st, g, &c[..m], res, tau),
            4 => add_gaussian_plain::<4>(st, g, &c[..m], res, tau),
            5 => add_gaussian_plain::<5>(st, g, &c[..m], res, tau),
            6 => add_gaussian_plain::<6>(st, g, &c[..m], res, tau),
            _ => false,
        };
        if done {
            return;
        }
    }
    let (v, vz) = (&mut v[..m], &mut vz[..m]);
    for k in 0..g {
        let tk = &tau[k * TILE..k * TILE + m];
        // Rows of zero weight do not count as effective rows.
        for ((vv, cv), t) in v.iter_mut().zip(&c[..m]).zip(tk) {
            *vv = if *cv == 0.0 { 0.0 } else { *t };
        }
        st.rows[k] += total(v);
        for ((vv, cv), t) in v.iter_mut().zip(&c[..m]).zip(tk) {
            *vv = cv * t;
        }
        st.weight[k] += total(v);
        let res_k = &res[k * d * TILE..(k + 1) * d * TILE];
        for a in 0..q {
            // The intercept column is 1, so v z_0 is v.
            let vza: &[f64] = if a == 0 {
                v
            } else {
                for ((o, vv), za) in vz.iter_mut().zip(v.iter()).zip(&z[a * TILE..a * TILE + m]) {
                    *o = vv * za;
                }
                vz
            };
            dots_into(vza, z, a + 1, &mut st.zz[(k * q + a) * q..]);
            dots_into(vza, res_k, d, &mut st.zr[(k * q + a) * d..]);
        }
        for a in 0..d {
            for ((o, vv), x) in vz.iter_mut().zip(v.iter()).zip(&res_k[a * TILE..a * TILE + m]) {
                *o = vv * x;
            }
            dots_into(vz, res_k, a + 1, &mut st.rr[(k * d + a) * d..]);
        }
    }
}

/// [`add_gaussian`] without component covariates (q = 1) and with D indicators: one pass
/// per cluster with every sum in registers, eight lanes each, added by [`fold8`]. Returns
/// true (it always applies).
#[inline(always)]
fn add_gaussian_plain<const D: usize>(st: &mut GaussianStats, g: usize, c: &[f64], res: &[f64], tau: &[f64]) -> bool {
    let m = c.len();
    let full = m - m % 8;
    for k in 0..g {
        let tk = &tau[k * TILE..k * TILE + m];
        let res_k = &res[k * D * TILE..(k + 1) * D * TILE];
        let mut rows = [0.0f64; 8];
        let mut weight = [0.0f64; 8];
        let mut zr = [[0.0f64; 8]; D];
        let mut rr = [[[0.0f64; 8]; D]; D];
        for o in (0..full).step_by(8) {
            let cv: &[f64; 8] = c[o..o + 8].try_into().expect("eight");
            let tv: &[f64; 8] = tk[o..o + 8].try_into().expect("eight");
            let r: [[f64; 8]; D] =
                std::array::from_fn(|b| res_k[b * TILE + o..b * TILE + o + 8].try_into().expect("eight"));
            let mut v = [0.0f64; 8];
            for l in 0..8 {
                rows[l] += if cv[l] == 0.0 { 0.0 } else { tv[l] };
                v[l] = cv[l] * tv[l];
                weight[l] += v[l];
            }
            for a in 0..D {
                let mut vr = [0.0f64; 8];
                for l in 0..8 {
                    vr[l] = v[l] * r[a][l];
                    zr[a][l] += vr[l];
                }
                // An exclusive range: the compiler unrolls it and keeps the sums in
                // registers, which it does not do for `0..=a`.
                #[allow(clippy::range_plus_one)]
                for b in 0..a + 1 {
                    for l in 0..8 {
                        rr[a][b][l] = vr[l].mul_add(r[b][l], rr[a][b][l]);
                    }
                }
            }
        }
        // The last rows of a short tile, one lane each.
        for i in full..m {
            let l = i - full;
            rows[l] += if c[i] == 0.0 { 0.0 } else { tk[i] };
            let v = c[i] * tk[i];
            weight[l] += v;
            let r: [f64; D] = std::array::from_fn(|b| res_k[b * TILE + i]);
            for a in 0..D {
                let vr = v * r[a];
                zr[a][l] += vr;
                for b in 0..=a {
                    rr[a][b][l] = vr.mul_add(r[b], rr[a][b][l]);
                }
            }
        }
        // A barrier between the row loop and the folds: otherwise the compiler shapes the
        // loop's vectors after the folds' pairs and the loop loses its full width.
        let (rows, weight, zr, rr) = std::hint::black_box((rows, weight, zr, rr));
        st.rows[k] += fold8(&rows);
        st.weight[k] += fold8(&weight);
        // The intercept's cross-product is the weight itself.
        st.zz[k] += fold8(&weight);
        for (a, (zr_a, rr_a)) in zr.iter().zip(&rr).enumerate() {
            st.zr[k * D + a] += fold8(zr_a);
            for (b, acc) in rr_a.iter().enumerate().take(a + 1) {
                st.rr[(k * D + a) * D + b] += fold8(acc);
            }
        }
    }
    true
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

/// `lp += base − ½|L⁻¹r|²` for the residuals `res` (D runs of `TILE`) of one cluster,
/// eight rows at a time in registers. `l` is L⁻¹, D×D row-major.
#[inline(always)]
fn add_log_normal<const D: usize>(l: &[f64], res: &[f64], base: f64, lp: &mut [f64]) {
    let mut lm = [[0.0f64; D]; D];
    for (a, row) in lm.iter_mut().enumerate() {
        row.copy_from_slice(&l[a * D..(a + 1) * D]);
    }
    let m = lp.len();
    let full = m - m % 8;
    for o in (0..full).step_by(8) {
        let mut r = [[0.0f64; 8]; D];
        for (b, rb) in r.iter_mut().enumerate() {
            rb.copy_from_slice(&res[b * TILE + o..b * TILE + o + 8]);
        }
        let quad = mahalanobis::<D>(&lm, &r);
        for (out, qv) in lp[o..o + 8].iter_mut().zip(&quad) {
            *out += base - 0.5 * qv;
        }
    }
    if full < m {
        let width = m - full;
        let mut r = [[0.0f64; 8]; D];
        for (b, rb) in r.iter_mut().enumerate() {
            rb[..width].copy_from_slice(&res[b * TILE + full..b * TILE + m]);
        }
        let quad = mahalanobis::<D>(&lm, &r);
        for (out, qv) in lp[full..].iter_mut().zip(&quad) {
            *out += base - 0.5 * qv;
        }
    }
}

/// [`add_log_normal`] with residuals r = y − `mean` made from the indicator runs `y`
/// (D runs of `TILE`), written to `res` when `keep`.
#[inline(always)]
fn add_log_normal_centred<const D: usize>(
    l: &[f64],
    y: &[f64],
    mean: &[f64],
    base: f64,
    lp: &mut [f64],
    res: &mut [f64],
    keep: bool,
) {
    let mut lm = [[0.0f64; D]; D];
    for (a, row) in lm.iter_mut().enumerate() {
        row.copy_from_slice(&l[a * D..(a + 1) * D]);
    }
    let mu: [f64; D] = mean.try_into().expect("D means");
    let m = lp.len();
    let full = m - m % 8;
    for o in (0..full).step_by(8) {
        let mut r = [[0.0f64; 8]; D];
        for (b, rb) in r.iter_mut().enumerate() {
            let yb: &[f64; 8] = y[b * TILE + o..b * TILE + o + 8].try_into().expect("eight");
            for lane in 0..8 {
                rb[lane] = yb[lane] - mu[b];
            }
        }
        if keep {
            for (b, rb) in r.iter().enumerate() {
                res[b * TILE + o..b * TILE + o + 8].copy_from_slice(rb);
            }
        }
        let quad = mahalanobis::<D>(&lm, &r);
        for (out, qv) in lp[o..o + 8].iter_mut().zip(&quad) {
            *out += base - 0.5 * qv;
        }
    }
    if full < m {
        let width = m - full;
        let mut r = [[0.0f64; 8]; D];
        for (b, rb) in r.iter_mut().enumerate() {
            for (lane, x) in rb.iter_mut().enumerate().take(width) {
                *x = y[b * TILE + full + lane] - mu[b];
            }
            if keep {
                res[b * TILE + full..b * TILE + m].copy_from_slice(&rb[..width]);
            }
        }
        let quad = mahalanobis::<D>(&lm, &r);
        for (out, qv) in lp[full..].iter_mut().zip(&quad) {
            *out += base - 0.5 * qv;
        }
    }
}

/// |L⁻¹r|² for eight rows.
#[inline(always)]
fn mahalanobis<const D: usize>(lm: &[[f64; D]; D], r: &[[f64; 8]; D]) -> [f64; 8] {
    let mut quad = [0.0f64; 8];
    for (a, la) in lm.iter().enumerate() {
        let mut u = [0.0f64; 8];
        #[allow(clippy::range_plus_one, clippy::needless_range_loop)]
        for b in 0..a + 1 {
            let lab = &la[b];
            for lane in 0..8 {
                u[lane] = lab.mul_add(r[b][lane], u[lane]);
            }
        }
        for lane in 0..8 {
            quad[lane] = u[lane].mul_add(u[lane], quad[lane]);
        }
    }
    quad
}

/// [`add_log_normal`] for any number of indicators, one run at a time.
fn add_log_normal_any(d: usize, l: &[f64], res: &[f64], base: f64, lp: &mut [f64], u: &mut [f64], quad: &mut [f64]) {
    let m = lp.len();
    let (u, quad) = (&mut u[..m], &mut quad[..m]);
    quad.fill(0.0);
    for a in 0..d {
        u.fill(0.0);
        for b in 0..=a {
            let lab = l[a * d + b];
            for (o, x) in u.iter_mut().zip(&res[b * TILE..b * TILE + m]) {
                *o += lab * x;
            }
        }
        for (qv, uv) in quad.iter_mut().zip(u.iter()) {
            *qv += uv * uv;
        }
    }
    for (o, qv) in lp.iter_mut().zip(quad.iter()) {
        *o += base - 0.5 * qv;
    }
}

/// One tile of the E-step: rows `start..start + m`, `tau` their rows of the n×G
/// responsibilities (None: not kept).
///
/// A kernel, longer than the rest of the library's functions on purpose: its stages share
/// the tile's scratch in registers and caches, and splitting it into calls the compiler
/// may not inline changed how it vectorised (see "Row passes and speed" in
/// DEVELOPERS.md).
#[inline(always)]
fn e_step_tile(pass: &Pass, start: usize, m: usize, tau: Option<&mut [f64]>, sc: &mut Scratch, part: &mut Partial) {
    let (g, r) = (pass.g, &pass.rows);
    let end = start + m;
    let c = &r.weights[start..end];
    for k in 0..g {
        let lp = &mut sc.lp[k * TILE..k * TILE + m];
        if !pass.has_base {
            lp.fill(0.0);
        }
    }
    if pass.has_base {
        let base = tau.as_deref().expect("the other blocks' log-densities are in tau");
        transpose(base, g, &mut sc.lp);
    }
    if let Some(gp) = &pass.gaussian {
        let (d, q) = (r.d, r.q);
        transpose(&r.y[start * d..end * d], d, &mut sc.y);
        // Without component covariates the one column is the intercept, which the
        // register kernels (up to 6 indicators, `add_gaussian_plain`) never read.
        if q > 1 || d > 6 {
            transpose(&r.z[start * q..end * q], q, &mut sc.z);
        }
        if q == 1 && d <= 8 {
            // Without component covariates the residuals are y minus the cluster mean,
            // made in registers; they are stored only when the M-step sums need them.
            let keep = pass.want_gaussian;
            for k in 0..g {
                let l = &gp.inv_chol[k * d * d..(k + 1) * d * d];
                let mean = &gp.coef[k * d..(k + 1) * d];
                let res_k = &mut sc.res[k * d * TILE..(k + 1) * d * TILE];
                let lp_k = &mut sc.lp[k * TILE..k * TILE + m];
                let base = gp.base[k];
                let y = &sc.y;
                up_to_eight!(
                    d,
                    add_log_normal_centred(l, y, mean, base, lp_k, res_k, keep),
                    unreachable!("this branch has 1 to 8 indicators")
                )
            }
        } else {
            residuals(gp.coef, g, q, d, m, sc);
            for k in 0..g {
                let l = &gp.inv_chol[k * d * d..(k + 1) * d * d];
                let res_k = &sc.res[k * d * TILE..(k + 1) * d * TILE];
                let lp_k = &mut sc.lp[k * TILE..k * TILE + m];
                let base = gp.base[k];
                up_to_eight!(
                    d,
                    add_log_normal(l, res_k, base, lp_k),
                    add_log_normal_any(d, l, res_k, base, lp_k, &mut sc.u, &mut sc.quad)
                )
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
    part.loglik += dot(c, &sc.lse);
    if let Some(tau) = tau {
        untranspose(&sc.lp, g, tau);
    }
    if let Some(st) = part.gating.as_mut() {
        dots_into(c, &sc.lp, g, &mut st.cluster_weight);
        if logit {
            let p = r.p;
            if pass.gating_hessian {
                gating_products(&sc.w, p, m, &mut sc.ww);
            }
            add_gating(
                st,
                pass.gating_hessian,
                g,
                p,
                m,
                c,
                &sc.lp,
                &sc.eta,
                None,
                &sc.w,
                &sc.ww,
                &mut sc.s,
                &mut sc.hsum,
            );
        }
    }
    if let (Some(st), true) = (part.gaussian.as_mut(), pass.want_gaussian) {
        add_gaussian(st, g, m, c, &sc.z, &sc.res, &sc.lp, &mut sc.v, &mut sc.vz);
    }
}

/// Run `task` over tasks of [`TASK_ROWS`] rows (first row, row count and, when `tau` is
/// given, their rows of the n×`g` `tau`), in parallel when there is more than one, and
/// add the partial sums in task order.
fn over_tasks<F>(n: usize, g: usize, tau: Option<&mut [f64]>, task: F) -> Partial
where
    F: Fn(usize, usize, Option<&mut [f64]>) -> Partial + Sync,
{
    let rows_of = |t: usize| TASK_ROWS.min(n - t * TASK_ROWS);
    let parts: Vec<Partial> = match tau {
        Some(tau) => {
            assert_eq!(tau.len(), n * g);
            if n <= TASK_ROWS {
                vec![task(0, n, Some(tau))]
            } else {
                tau.par_chunks_mut(TASK_ROWS * g)
                    .enumerate()
                    .map(|(t, chunk)| task(t * TASK_ROWS, rows_of(t), Some(chunk)))
                    .collect()
            }
        }
        None if n <= TASK_ROWS => vec![task(0, n, None)],
        None => (0..n.div_ceil(TASK_ROWS))
            .into_par_iter()
            .map(|t| task(t * TASK_ROWS, rows_of(t), None))
            .collect(),
    };
    in_task_order(parts)
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
fn e_step_task_body(pass: &Pass, start: usize, len: usize, mut tau: Option<&mut [f64]>) -> Partial {
    let r = &pass.rows;
    let g = pass.g;
    let mut sc = Scratch::take(g, r.d, r.q, if matches!(pass.prior, Prior::Logit(_)) { r.p } else { 0 });
    let mut part = Partial {
        loglik: 0.0,
        gaussian: (pass.want_gaussian)
            .then(|| GaussianStats::zeros(g, r.q, r.d, pass.gaussian.as_ref().map_or(&[][..], |gp| gp.coef))),
        gating: pass.want_gating.then(|| GatingStats::zeros(g, r.p)),
    };
    for offset in (0..len).step_by(TILE) {
        let (first, m) = (start + offset, TILE.min(len - offset));
        let tile = tau.as_deref_mut().map(|x| &mut x[offset * g..(offset + m) * g]);
        // Ask for the next tile's indicators while this one is computed.
        let next = (first + TILE).min(r.n);
        prefetch(&r.y[next * r.d..(next + TILE).min(r.n) * r.d]);
        e_step_tile(pass, first, m, tile, &mut sc, &mut part);
    }
    sc.give_back();
    part
}

/// A hint to bring `data` into the cache; no effect on results.
#[inline(always)]
fn prefetch(data: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    for line in data.chunks(8) {
        // SAFETY: prefetching never faults and the address is inside a live slice.
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(line.as_ptr().cast());
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = data;
}

widest!(
    /// One E-step task in the widest instruction set available.
    fn e_step_task(pass: &Pass, start: usize, len: usize, tau: Option<&mut [f64]>) -> Partial = e_step_task_body
);

/// The E-step over all rows: adds the Gaussian log-densities (if any) and the log
/// cluster probabilities to `tau` (which holds the other blocks' log-densities with
/// [`Base::Written`], and is overwritten otherwise), turns rows into responsibilities and
/// returns the weighted log-likelihood. Fills the gating sums when asked and the gating
/// network is a logit, and the Gaussian sums when asked and there is a Gaussian block.
/// Without `tau` (allowed only with [`Base::Empty`]) the responsibilities are not kept:
/// the pass then only sums.
pub fn e_step(
    rows: PassRows,
    gaussian: Option<&GaussianComponents>,
    gating: &Gating,
    base: Base,
    tau: Option<&mut [f64]>,
    gating_stats: Option<&mut GatingStats>,
    gaussian_stats: Option<&mut GaussianStats>,
) -> f64 {
    let want = Wanted {
        gating: gating_stats.is_some(),
        gating_hessian: true,
        gaussian: gaussian_stats.is_some() && gaussian.is_some(),
    };
    let total = run_pass(rows, gaussian, gating, base == Base::Written, tau, want);
    if let (Some(out), Some(s)) = (gating_stats, total.gating) {
        *out = s;
    }
    if let (Some(out), Some(s)) = (gaussian_stats, total.gaussian) {
        *out = s;
    }
    total.loglik
}

/// The sums the observed-data score of a Gaussian model is made of, in one pass that
/// keeps no responsibilities: the weighted log-likelihood, the gating score and each
/// cluster's weighted total (no Hessian), and the Gaussian sums about the model's own
/// coefficients.
pub fn score_sums(rows: PassRows, gaussian: &GaussianComponents, gating: &Gating) -> (f64, GatingStats, GaussianStats) {
    let want = Wanted {
        gating: true,
        gating_hessian: false,
        gaussian: true,
    };
    let total = run_pass(rows, Some(gaussian), gating, false, None, want);
    let (Some(gating_sums), Some(gaussian_sums)) = (total.gating, total.gaussian) else {
        unreachable!("both sums were asked for")
    };
    (total.loglik, gating_sums, gaussian_sums)
}

/// Which sums a pass adds besides the log-likelihood.
#[derive(Clone, Copy)]
struct Wanted {
    gating: bool,
    gating_hessian: bool,
    gaussian: bool,
}

fn run_pass(
    rows: PassRows,
    gaussian: Option<&GaussianComponents>,
    gating: &Gating,
    has_base: bool,
    tau: Option<&mut [f64]>,
    want: Wanted,
) -> Partial {
    let g = gating.clusters();
    let prior = match gating {
        Gating::Logit { gamma, .. } => Prior::Logit(gamma),
        other => {
            let mut lp = vec![0.0; g];
            other.log_priors(&[], &mut lp);
            Prior::Constant(lp)
        }
    };
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
        want_gaussian: want.gaussian,
        want_gating: want.gating,
        gating_hessian: want.gating_hessian,
    };
    assert!(
        tau.is_some() || !has_base,
        "the other blocks' log-densities come in tau"
    );
    over_tasks(rows.n, g, tau, |start, len, chunk| {
        e_step_task(&pass, start, len, chunk)
    })
}

#[inline(always)]
fn gaussian_stats_task_body(rows: &PassRows, g: usize, at: &[f64], start: usize, tau: &[f64]) -> Partial {
    let (d, q) = (rows.d, rows.q);
    let mut sc = Scratch::take(g, d, q, 0);
    let mut st = GaussianStats::zeros(g, q, d, at);
    let mut t_cols = vec![0.0; g * TILE];
    for (t, tile) in tau.chunks(TILE * g).enumerate() {
        let s = start + t * TILE;
        let m = tile.len() / g;
        let c = &rows.weights[s..s + m];
        transpose(&rows.y[s * d..(s + m) * d], d, &mut sc.y);
        transpose(&rows.z[s * q..(s + m) * q], q, &mut sc.z);
        transpose(tile, g, &mut t_cols);
        residuals(at, g, q, d, m, &mut sc);
        add_gaussian(&mut st, g, m, c, &sc.z, &sc.res, &t_cols, &mut sc.v, &mut sc.vz);
    }
    sc.give_back();
    Partial {
        loglik: 0.0,
        gaussian: Some(st),
        gating: None,
    }
}

widest!(
    /// One task of [`gaussian_stats`] in the widest instruction set available.
    fn gaussian_stats_task(rows: &PassRows, g: usize, at: &[f64], start: usize, tau: &[f64]) -> Partial = gaussian_stats_task_body
);

/// The Gaussian M-step sums from given responsibilities (n×G), around coefficients `at`.
pub fn gaussian_stats(rows: &PassRows, g: usize, at: &[f64], tau: &[f64]) -> GaussianStats {
    let total = over_tasks_read(rows.n, g, tau, |start, chunk| {
        gaussian_stats_task(rows, g, at, start, chunk)
    });
    total.gaussian.expect("the Gaussian pass sums Gaussian statistics")
}

/// The tasks' partial sums added in task order (the order that makes results independent
/// of the thread count).
fn in_task_order(parts: Vec<Partial>) -> Partial {
    let mut parts = parts.into_iter();
    let mut first = parts.next().expect("at least one task");
    for p in parts {
        first.add(p);
    }
    first
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
    in_task_order(parts)
}

/// What the logit pass reads besides the responsibilities.
struct LogitInput<'a> {
    w: &'a [f64],
    p: usize,
    g: usize,
    weights: &'a [f64],
    gamma: &'a [f64],
    derivatives: bool,
}

#[inline(always)]
fn logit_task_body(input: &LogitInput, tau: &[f64], start: usize) -> Partial {
    let LogitInput {
        w,
        p,
        g,
        weights,
        gamma,
        derivatives,
    } = *input;
    let mut sc = Scratch::take(g, 0, 0, p);
    let mut t_cols = vec![0.0; g * TILE];
    let mut part = Partial {
        loglik: 0.0,
        gaussian: None,
        gating: derivatives.then(|| GatingStats::zeros(g, p)),
    };
    for (t, tile) in tau.chunks(TILE * g).enumerate() {
        let s = start + t * TILE;
        let m = tile.len() / g;
        let c = &weights[s..s + m];
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
        part.loglik += dot(c, lin);
        if let Some(st) = part.gating.as_mut() {
            gating_products(&sc.w, p, m, &mut sc.ww);
            add_gating(
                st,
                true,
                g,
                p,
                m,
                c,
                &t_cols,
                &sc.eta,
                Some(&sc.s[..m]),
                &sc.w,
                &sc.ww,
                &mut sc.quad,
                &mut sc.hsum,
            );
        }
    }
    sc.give_back();
    part
}

widest!(
    /// One task of [`logit_pass`] in the widest instruction set available.
    fn logit_task(input: &LogitInput, tau: &[f64], start: usize) -> Partial = logit_task_body
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
    let input = LogitInput {
        w,
        p,
        g,
        weights,
        gamma,
        derivatives,
    };
    let total = over_tasks_read(weights.len(), g, tau, |start, chunk| logit_task(&input, chunk, start));
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
    fn ln_is_within_two_units_in_the_last_place() {
        let mut worst = 0.0f64;
        let mut x = 1e-300;
        while x < 1e300 {
            let (a, b) = (ln(x), x.ln());
            worst = worst.max(((a - b) / b).abs());
            x *= 1.0173;
        }
        for i in 0..10_000 {
            let x = 1.0 + i as f64 * 4e-4;
            let (a, b) = (ln(x), x.ln());
            worst = worst.max((a - b).abs() / b.abs().max(1e-300).max(1.0));
        }
        assert!(worst < 4.5e-16, "worst relative error {worst:e}");
        assert_eq!(ln(0.0), f64::NEG_INFINITY);
        assert_eq!(ln(1.0), 0.0);
        assert!(ln(-1.0).is_nan() && ln(f64::NAN).is_nan());
        assert_eq!(ln(f64::INFINITY), f64::INFINITY);
    }

    #[test]
    fn dot_matches_a_plain_sum() {
        let a: Vec<f64> = (0..37).map(|i| (i as f64 * 0.37).sin()).collect();
        let b: Vec<f64> = (0..37).map(|i| (i as f64 * 0.11).cos()).collect();
        let plain: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
        assert!((dot(&a, &b) - plain).abs() < 1e-13);
        assert!((total(&a) - a.iter().sum::<f64>()).abs() < 1e-13);
    }

    #[test]
    fn dots_into_adds_each_run_exactly_as_dot() {
        // Full tiles and a short one (lanes and a tail), odd and even run counts.
        for m in [TILE, 77, 5] {
            for count in 1..=5 {
                let x: Vec<f64> = (0..m).map(|i| (i as f64 * 0.37).sin() * 1e3).collect();
                let buf: Vec<f64> = (0..count * TILE).map(|i| (i as f64 * 0.11).cos() / 7.0).collect();
                let start: Vec<f64> = (0..count).map(|b| b as f64 * 0.5).collect();
                let mut out = start.clone();
                dots_into(&x, &buf, count, &mut out);
                for b in 0..count {
                    let one = start[b] + dot(&x, &buf[b * TILE..]);
                    assert_eq!(out[b].to_bits(), one.to_bits(), "m = {m}, count = {count}, run {b}");
                }
            }
        }
    }
}
