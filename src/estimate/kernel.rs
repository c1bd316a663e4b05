//! Kernel two-sample tests: has what the model sees changed between a reference sample and a
//! current one? Label-free, so they speak while the labels are still on their way. Pure: points
//! in, statistics and p-values out.
//!
//! - Points are standardised by the reference's mean and sample standard deviation (ddof 1) per
//!   numeric column; each categorical column adds 1 to the squared distance when the values
//!   differ. Gaussian kernel k(x, y) = exp(−‖x − y‖² / (2σ²)), σ given or the median pairwise
//!   distance of the pooled sample (the median heuristic; a symmetric function of the pooled
//!   sample, so the permutation test stays exact).
//! - MMD² unbiased and biased (Gretton, Borgwardt, Rasch, Schölkopf & Smola, "A kernel
//!   two-sample test", JMLR 13, 2012, eq. 3 and its biased form).
//! - A seeded permutation test, p = (1 + #{permuted ≥ observed}) / (1 + P): exact level.
//! - The spectral test (Gretton, Fukumizu, Harchaoui & Sriperumbudur, "A fast, consistent kernel
//!   two-sample test", NIPS 2009): (mn/(m+n))·MMD²_u against Σ_l λ_l (z_l² − 1), λ_l the
//!   eigenvalues of the centred pooled Gram matrix HKH divided by m + n. Its level is asymptotic.
//!   The leading eigenvalues carrying 99.9% of the null's variance come from a partial solver;
//!   the others enter as one Gaussian term of their exact total variance.

use super::seeded::Seeded;

/// Why a test could not run.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum KernelError {
    #[error("the {0} sample has fewer than 2 points")]
    TooFew(&'static str),
    #[error("column {0} is constant in the reference (its standard deviation is 0): it cannot be standardised")]
    Constant(String),
    #[error("the bandwidth must be positive and finite, got {0}")]
    Bandwidth(f64),
    #[error("every pooled point is the same: the median distance is 0; give a bandwidth")]
    Degenerate,
    #[error("the eigenvalue solver did not converge")]
    Eigen,
}

/// Points of one sample: numeric features row-major (`dims` per point) and categorical codes.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Points {
    pub numeric: Vec<f64>,
    pub dims: usize,
    /// Categorical values coded as integers, `cats` per point.
    pub categorical: Vec<u32>,
    pub cats: usize,
}

impl Points {
    pub fn len(&self) -> usize {
        self.numeric.len().checked_div(self.dims).or(self.categorical.len().checked_div(self.cats)).unwrap_or(0)
    }
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// The points at `idx`, in that order.
    pub fn select(&self, idx: &[usize]) -> Points {
        let mut out = Points { dims: self.dims, cats: self.cats, ..Points::default() };
        for &i in idx {
            out.numeric.extend_from_slice(self.num(i));
            out.categorical.extend_from_slice(self.cat(i));
        }
        out
    }

    /// Point `i` standardised by `scale` (mean, standard deviation per numeric column).
    pub fn standardised(&self, i: usize, scale: &[(f64, f64)]) -> super::kernel_betting::Point {
        super::kernel_betting::Point {
            numeric: self.num(i).iter().zip(scale).map(|(x, (mu, sd))| (x - mu) / sd).collect(),
            categorical: self.cat(i).to_vec(),
        }
    }

    fn num(&self, i: usize) -> &[f64] {
        &self.numeric[i * self.dims..(i + 1) * self.dims]
    }
    fn cat(&self, i: usize) -> &[u32] {
        &self.categorical[i * self.cats..(i + 1) * self.cats]
    }
}

/// The reference's mean and sample standard deviation (ddof 1) per numeric column; `names`
/// says which column a constant one is.
pub fn standardiser(reference: &Points, names: &[String]) -> Result<Vec<(f64, f64)>, KernelError> {
    let n = reference.len();
    if n < 2 {
        return Err(KernelError::TooFew("reference"));
    }
    (0..reference.dims)
        .map(|d| {
            let col = (0..n).map(|i| reference.num(i)[d]);
            let mean = col.clone().sum::<f64>() / n as f64;
            let var = col.map(|x| (x - mean) * (x - mean)).sum::<f64>() / (n - 1) as f64;
            let sd = var.sqrt();
            if sd > 0.0 && sd.is_finite() {
                Ok((mean, sd))
            } else {
                Err(KernelError::Constant(names.get(d).cloned().unwrap_or_else(|| format!("#{d}"))))
            }
        })
        .collect()
}

/// The pooled sample [reference; current] standardised, ready for distances.
#[derive(Clone, Debug)]
pub struct Pooled {
    pub m: usize,
    pub n: usize,
    points: Points,
}

impl Pooled {
    pub fn new(reference: &Points, current: &Points, scale: &[(f64, f64)]) -> Result<Pooled, KernelError> {
        if reference.len() < 2 {
            return Err(KernelError::TooFew("reference"));
        }
        if current.len() < 2 {
            return Err(KernelError::TooFew("current"));
        }
        let (m, n) = (reference.len(), current.len());
        let mut numeric = Vec::with_capacity((m + n) * reference.dims);
        for p in [reference, current] {
            for i in 0..p.len() {
                numeric.extend(p.num(i).iter().zip(scale).map(|(x, (mu, sd))| (x - mu) / sd));
            }
        }
        let mut categorical = reference.categorical.clone();
        categorical.extend_from_slice(&current.categorical);
        Ok(Pooled { m, n, points: Points { numeric, dims: reference.dims, categorical, cats: reference.cats } })
    }

    /// ‖x_i − x_j‖² with categorical mismatches counted 1 each.
    fn dist2(&self, i: usize, j: usize) -> f64 {
        let p = &self.points;
        let num: f64 = p.num(i).iter().zip(p.num(j)).map(|(a, b)| (a - b) * (a - b)).sum();
        let cat = p.cat(i).iter().zip(p.cat(j)).filter(|(a, b)| a != b).count();
        num + cat as f64
    }

    /// The median of the pairwise distances ‖x_i − x_j‖ over i < j (the median heuristic; the
    /// lower middle value when the count is even, as a selection gives it).
    pub fn median_distance(&self) -> Result<f64, KernelError> {
        let total = self.m + self.n;
        let mut d2: Vec<f64> = Vec::with_capacity(total * (total - 1) / 2);
        for i in 0..total {
            for j in i + 1..total {
                d2.push(self.dist2(i, j));
            }
        }
        let mid = (d2.len() - 1) / 2;
        let (_, v, _) = d2.select_nth_unstable_by(mid, f64::total_cmp);
        let med = v.sqrt();
        if med > 0.0 {
            Ok(med)
        } else {
            Err(KernelError::Degenerate)
        }
    }

    /// The pooled Gram matrix at bandwidth σ (row-major, (m+n)²).
    pub fn gram(&self, sigma: f64) -> Result<Gram, KernelError> {
        if !(sigma > 0.0 && sigma.is_finite()) {
            return Err(KernelError::Bandwidth(sigma));
        }
        let total = self.m + self.n;
        let scale = -1.0 / (2.0 * sigma * sigma);
        let mut k = faer::Mat::<f64>::zeros(total, total);
        for i in 0..total {
            k[(i, i)] = 1.0;
            for j in i + 1..total {
                let v = (self.dist2(i, j) * scale).exp();
                k[(i, j)] = v;
                k[(j, i)] = v;
            }
        }
        Ok(Gram { m: self.m, n: self.n, k })
    }
}

/// A pooled Gram matrix: the first m rows are the reference's points.
pub struct Gram {
    pub m: usize,
    pub n: usize,
    k: faer::Mat<f64>,
}

/// MMD² estimates.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Mmd {
    pub unbiased: f64,
    pub biased: f64,
}

/// The three block sums a labelling needs: Σ over X×X, Y×Y and X×Y of k (diagonals included),
/// and the diagonal sums of each side.
fn mmd_from_sums(m: usize, n: usize, xx: f64, yy: f64, xy: f64, dx: f64, dy: f64) -> Mmd {
    let (mf, nf) = (m as f64, n as f64);
    Mmd {
        unbiased: (xx - dx) / (mf * (mf - 1.0)) + (yy - dy) / (nf * (nf - 1.0)) - 2.0 * xy / (mf * nf),
        biased: xx / (mf * mf) + yy / (nf * nf) - 2.0 * xy / (mf * nf),
    }
}

impl Gram {
    fn total(&self) -> usize {
        self.m + self.n
    }

    /// MMD² of the labelling in which the first m points are the reference.
    pub fn mmd(&self) -> Mmd {
        let (m, t) = (self.m, self.total());
        let (mut xx, mut yy, mut xy) = (0.0, 0.0, 0.0);
        for j in 0..t {
            let col = self.k.col(j);
            for i in 0..t {
                let v = col[i];
                match (i < m, j < m) {
                    (true, true) => xx += v,
                    (false, false) => yy += v,
                    _ => xy += v,
                }
            }
        }
        let dx: f64 = (0..m).map(|i| self.k[(i, i)]).sum();
        let dy: f64 = (m..t).map(|i| self.k[(i, i)]).sum();
        mmd_from_sums(m, self.n, xx, yy, xy / 2.0, dx, dy)
    }

    /// The permutation p-value of the unbiased MMD²: `permutations` seeded relabellings, each an
    /// m-subset of the pooled points drawn uniformly, p = (1 + #{T_b ≥ T}) / (1 + P).
    ///
    /// For an indicator x of the relabelled reference, xᵀKx is the X×X sum, and with the row
    /// sums r = K1 the X×Y sum is xᵀr − xᵀKx; so the P relabellings cost one product K·[x_1 …
    /// x_P] (a matrix product, at the speed of the linear-algebra crate) instead of P passes.
    pub fn permutation_p(&self, observed: f64, permutations: usize, seed: u64) -> f64 {
        let t = self.total();
        let m = self.m;
        let mut rng = Seeded::new(seed);
        let r: Vec<f64> = (0..t).map(|i| self.k.row(i).iter().sum()).collect();
        let all: f64 = r.iter().sum();
        let diag: Vec<f64> = (0..t).map(|i| self.k[(i, i)]).collect();
        let trace: f64 = diag.iter().sum();
        let mut exceed = 0usize;
        // In blocks, so the indicator matrix and the product stay a few MiB.
        const BLOCK: usize = 64;
        let mut done = 0;
        let mut order: Vec<usize> = (0..t).collect();
        while done < permutations {
            let b = BLOCK.min(permutations - done);
            let mut ind = faer::Mat::<f64>::zeros(t, b);
            for c in 0..b {
                // A partial Fisher–Yates shuffle: the first m of `order` are a uniform m-subset.
                for i in 0..m {
                    let j = i + rng.below((t - i) as u64) as usize;
                    order.swap(i, j);
                }
                for &i in &order[..m] {
                    ind[(i, c)] = 1.0;
                }
            }
            let kx = &self.k * &ind;
            for c in 0..b {
                let (mut xx, mut xr, mut dx) = (0.0, 0.0, 0.0);
                for i in 0..t {
                    if ind[(i, c)] != 0.0 {
                        xx += kx[(i, c)];
                        xr += r[i];
                        dx += diag[i];
                    }
                }
                let xy = xr - xx;
                let yy = all - 2.0 * xr + xx;
                let stat = mmd_from_sums(m, self.n, xx, yy, xy, dx, trace - dx).unbiased;
                // A relabelling equal to the observed one must count as ≥ despite rounding.
                if stat >= observed - 1e-12 * observed.abs().max(1e-300) {
                    exceed += 1;
                }
            }
            done += b;
        }
        (1 + exceed) as f64 / (1 + permutations) as f64
    }

    /// The leading eigenvalues λ_l of HKH / (m + n), largest first: as many as hold
    /// [`SPECTRUM_SHARE`] of Σλ² (the null's variance over 2, known without them as the squared
    /// Frobenius norm), by a Krylov–Schur partial solver (faer) asked for 16, then twice as many
    /// until they hold enough; past a quarter of the matrix's size, a full solve is cheaper.
    pub fn centred_spectrum(&self) -> Result<Spectrum, KernelError> {
        let t = self.total();
        let tf = t as f64;
        let r: Vec<f64> = (0..t).map(|i| self.k.row(i).iter().sum::<f64>() / tf).collect();
        let all: f64 = r.iter().sum::<f64>() / tf;
        let hkh = faer::Mat::<f64>::from_fn(t, t, |i, j| (self.k[(i, j)] - r[i] - r[j] + all) / tf);
        let trace: f64 = (0..t).map(|i| hkh[(i, i)]).sum();
        let squares = hkh.squared_norm_l2();
        let mut want = 16usize;
        loop {
            if 4 * want >= t {
                let mut ev = hkh.self_adjoint_eigenvalues(faer::Side::Lower).map_err(|_| KernelError::Eigen)?;
                ev.sort_by(|a, b| b.total_cmp(a));
                ev.retain(|&v| v > 0.0);
                return Ok(Spectrum { top: ev, trace, squares });
            }
            let top = partial_top(&hkh, want)?;
            if top.iter().map(|l| l * l).sum::<f64>() >= SPECTRUM_SHARE * squares {
                return Ok(Spectrum { top, trace, squares });
            }
            want *= 2;
        }
    }
}

/// The share of the null's variance 2Σλ² the leading eigenvalues carry; the rest enters the
/// null as one Gaussian term of exactly the remaining variance (a sum of many small terms), so
/// the simulated null has the exact mean (0) and variance.
pub const SPECTRUM_SHARE: f64 = 0.999;

/// The leading eigenvalues of a centred pooled Gram matrix.
#[derive(Clone, Debug, PartialEq)]
pub struct Spectrum {
    /// The largest ones found, descending, positive.
    pub top: Vec<f64>,
    /// The sum of all of them (the matrix's trace).
    pub trace: f64,
    /// The sum of all their squares (the squared Frobenius norm).
    pub squares: f64,
}

/// The `k` largest eigenvalues of a symmetric positive semi-definite matrix (largest magnitude
/// is largest here), descending.
fn partial_top(a: &faer::Mat<f64>, k: usize) -> Result<Vec<f64>, KernelError> {
    use faer::dyn_stack::{MemBuffer, MemStack};
    use faer::matrix_free::eigen::{
        partial_self_adjoint_eigen, partial_self_adjoint_eigen_scratch, PartialEigenParams,
    };
    let t = a.nrows();
    let op = a.as_ref();
    let params = PartialEigenParams::default();
    let mut mem = MemBuffer::new(partial_self_adjoint_eigen_scratch(&op, k, faer::Par::Seq, params));
    let mut vecs = faer::Mat::<f64>::zeros(t, k);
    let mut vals = vec![0.0f64; k];
    // A fixed, dense start vector: reproducible, and not orthogonal to any eigenvector in practice.
    let v0 = faer::Col::<f64>::from_fn(t, |i| 1.0 + ((i * 7919) % 104_729) as f64 / 104_729.0);
    let v0 = &v0 / v0.norm_l2();
    let info = partial_self_adjoint_eigen(
        vecs.as_mut(),
        &mut vals,
        &op,
        v0.as_ref(),
        f64::EPSILON * 128.0,
        faer::Par::Seq,
        MemStack::new(&mut mem),
        params,
    );
    if info.n_converged_eigen < k {
        return Err(KernelError::Eigen);
    }
    vals.sort_by(|a, b| b.total_cmp(a));
    vals.retain(|&v| v > 0.0);
    Ok(vals)
}

/// The spectral test's outcome.
#[derive(Clone, Debug, PartialEq)]
pub struct Spectral {
    /// (mn/(m+n))·MMD²_u.
    pub statistic: f64,
    pub p_value: f64,
    /// Eigenvalues used: the leading ones carrying [`SPECTRUM_SHARE`] of the null's variance.
    pub eigenvalues: usize,
    pub draws: usize,
}

/// One standard normal from two uniforms (Box–Muller; the second value is dropped for
/// simplicity: the null draws are not the bottleneck).
fn normal(rng: &mut Seeded) -> f64 {
    let u = 1.0 - rng.uniform(); // (0, 1]
    let v = rng.uniform();
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// The spectral test of `mmd_unbiased` given the centred spectrum: `draws` seeded draws of
/// Σ_l λ_l (z_l² − 1) over the leading λ_l holding [`SPECTRUM_SHARE`] of the trace,
/// p = (1 + #{draw ≥ statistic}) / (1 + draws).
pub fn spectral_test(spectrum: &Spectrum, m: usize, n: usize, mmd_unbiased: f64, draws: usize, seed: u64) -> Spectral {
    let mut acc = 0.0;
    let mut used = 0;
    for &l in &spectrum.top {
        used += 1;
        acc += l * l;
        if acc >= SPECTRUM_SHARE * spectrum.squares {
            break;
        }
    }
    let lambdas = &spectrum.top[..used];
    let tail_sd = (2.0 * (spectrum.squares - acc).max(0.0)).sqrt();
    let statistic = (m as f64 * n as f64 / (m + n) as f64) * mmd_unbiased;
    let mut rng = Seeded::new(seed);
    let mut exceed = 0usize;
    for _ in 0..draws {
        let s: f64 = lambdas
            .iter()
            .map(|l| {
                let z = normal(&mut rng);
                l * (z * z - 1.0)
            })
            .sum::<f64>()
            + tail_sd * normal(&mut rng);
        if s >= statistic {
            exceed += 1;
        }
    }
    Spectral { statistic, p_value: (1 + exceed) as f64 / (1 + draws) as f64, eigenvalues: used, draws }
}

/// What a two-sample run asks for.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct TwoSampleSettings {
    /// σ of the kernel, or None for the median heuristic.
    pub bandwidth: Option<f64>,
    /// Relabellings of the permutation test; 0 runs none.
    pub permutations: usize,
    /// Simulated draws of the spectral null.
    pub null_draws: usize,
    pub seed: u64,
}

/// Every statistic and p-value of one reference-against-current comparison.
#[derive(Clone, Debug, PartialEq)]
pub struct TwoSample {
    pub m: usize,
    pub n: usize,
    pub bandwidth: f64,
    /// True when σ was given, false when it is the pooled median distance.
    pub bandwidth_given: bool,
    pub mmd: Mmd,
    pub permutation_p: Option<f64>,
    pub spectral: Spectral,
    /// Per numeric column, in order.
    pub ks: Vec<super::ks::Ks>,
}

/// The whole comparison of the command and of the daemon's per-look test: standardise, pool,
/// bandwidth, Gram matrix, MMD², the permutation and spectral tests, and a KS test per numeric
/// column. `lap` is called after each stage with its name (timings for the benchmark).
pub fn two_sample(
    reference: &Points,
    current: &Points,
    scale: &[(f64, f64)],
    s: TwoSampleSettings,
    mut lap: impl FnMut(&str),
) -> Result<TwoSample, KernelError> {
    let pooled = Pooled::new(reference, current, scale)?;
    let (bandwidth, bandwidth_given) = match s.bandwidth {
        Some(b) => (b, true),
        None => (pooled.median_distance()?, false),
    };
    let gram = pooled.gram(bandwidth)?;
    lap("bandwidth and gram");
    let mmd = gram.mmd();
    let permutation_p =
        (s.permutations > 0).then(|| gram.permutation_p(mmd.unbiased, s.permutations, s.seed.wrapping_add(2)));
    lap("permutation");
    let spectrum = gram.centred_spectrum()?;
    lap("spectrum");
    let spectral = spectral_test(&spectrum, pooled.m, pooled.n, mmd.unbiased, s.null_draws, s.seed.wrapping_add(3));
    lap("spectral null");
    let ks = (0..reference.dims)
        .map(|d| {
            let col = |p: &Points| -> Vec<f64> { (0..p.len()).map(|i| p.numeric[i * p.dims + d]).collect() };
            super::ks::two_sample(&col(reference), &col(current))
        })
        .collect();
    lap("ks");
    Ok(TwoSample { m: pooled.m, n: pooled.n, bandwidth, bandwidth_given, mmd, permutation_p, spectral, ks })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn points(xs: &[f64]) -> Points {
        Points { numeric: xs.to_vec(), dims: 1, categorical: Vec::new(), cats: 0 }
    }

    /// The unbiased and biased MMD² at k(x, y) = exp(−(x − y)²/2), checked against the
    /// definitions written out pair by pair (the fixture tests compare with numpy).
    #[test]
    fn mmd_matches_its_definition_and_permutations_use_the_same_formula() {
        let x = [0.61318059, -0.69222999, 0.94424411, -0.48769626, -0.00709551];
        let y = [0.35025598, 0.20741384, -0.63622519, -1.21315264, -0.77349617, -0.42707091];
        let unit = [(0.0, 1.0)];
        let pooled = Pooled::new(&points(&x), &points(&y), &unit).unwrap();
        let g = pooled.gram(1.0).unwrap();
        let k = |a: f64, b: f64| (-(a - b) * (a - b) / 2.0).exp();
        let (m, n) = (5.0, 6.0);
        let mut xx = 0.0;
        let mut yy = 0.0;
        let mut xy = 0.0;
        for (i, a) in x.iter().enumerate() {
            for (j, b) in x.iter().enumerate() {
                if i != j {
                    xx += k(*a, *b);
                }
            }
            for b in &y {
                xy += k(*a, *b);
            }
        }
        for (i, a) in y.iter().enumerate() {
            for (j, b) in y.iter().enumerate() {
                if i != j {
                    yy += k(*a, *b);
                }
            }
        }
        let want = xx / (m * (m - 1.0)) + yy / (n * (n - 1.0)) - 2.0 * xy / (m * n);
        let got = g.mmd();
        assert!((got.unbiased - want).abs() < 1e-14, "{} {want}", got.unbiased);
        let want_b = (xx + m) / (m * m) + (yy + n) / (n * n) - 2.0 * xy / (m * n);
        assert!((got.biased - want_b).abs() < 1e-14);
        // Every relabelling is ≥ some value: with the observed set to −∞ all count.
        assert_eq!(g.permutation_p(f64::NEG_INFINITY, 99, 1), 1.0);
        // Identity relabelling statistics agree with the direct one: at +∞ none count.
        assert_eq!(g.permutation_p(f64::INFINITY, 99, 1), 0.01);
    }

    /// The partial solver's leading eigenvalues are the full solver's (the fixture tests compare
    /// the full set with numpy).
    #[test]
    fn the_partial_solver_finds_the_leading_eigenvalues() {
        let mut rng = Seeded::new(9);
        let xs: Vec<f64> = (0..2 * 300).map(|_| normal(&mut rng)).collect();
        let ys: Vec<f64> = (0..2 * 200).map(|_| normal(&mut rng) + 0.2).collect();
        let p = |v: Vec<f64>| Points { numeric: v, dims: 2, ..Points::default() };
        let pooled = Pooled::new(&p(xs), &p(ys), &[(0.0, 1.0), (0.0, 1.0)]).unwrap();
        let g = pooled.gram(1.0).unwrap();
        let sp = g.centred_spectrum().unwrap();
        let t = 500;
        let tf = t as f64;
        let r: Vec<f64> = (0..t).map(|i| g.k.row(i).iter().sum::<f64>() / tf).collect();
        let all: f64 = r.iter().sum::<f64>() / tf;
        let hkh = faer::Mat::<f64>::from_fn(t, t, |i, j| (g.k[(i, j)] - r[i] - r[j] + all) / tf);
        let mut full = hkh.self_adjoint_eigenvalues(faer::Side::Lower).unwrap();
        full.sort_by(|a, b| b.total_cmp(a));
        assert!(sp.top.len() < t / 4, "the partial path ran ({} found)", sp.top.len());
        for (a, b) in sp.top.iter().zip(&full) {
            assert!((a - b).abs() < 1e-12 * full[0], "{a} {b}");
        }
        assert!((sp.trace - full.iter().sum::<f64>()).abs() < 1e-12 * sp.trace);
        assert!(sp.top.iter().map(|l| l * l).sum::<f64>() >= SPECTRUM_SHARE * sp.squares);
        assert!((sp.squares - full.iter().map(|l| l * l).sum::<f64>()).abs() < 1e-12 * sp.squares);
    }

    #[test]
    fn a_constant_reference_column_and_too_few_points_are_errors() {
        let e = standardiser(&points(&[1.0, 1.0, 1.0]), &["score".to_string()]).unwrap_err();
        assert_eq!(
            e.to_string(),
            "column score is constant in the reference (its standard deviation is 0): it cannot be standardised"
        );
        assert_eq!(
            Pooled::new(&points(&[1.0, 2.0]), &points(&[1.0]), &[(0.0, 1.0)]).unwrap_err(),
            KernelError::TooFew("current")
        );
    }
}
