//! The certificates that survive the selection of a slice: the uniform (Rademacher)
//! deviation, its variance-sensitive form, the localized diagnostic, and the held-out
//! confirmation of split-confirm.

use super::*;

/// The uniform certificate's numbers.
#[derive(Clone, Debug, PartialEq)]
pub struct Uniform {
    /// R̃_k of the class {(l − θ)·1_S}, centred (§3.1).
    pub rademacher: f64,
    pub sign_draws: usize,
    /// ε of Theorem U1 at this δ.
    pub deviation: f64,
}

/// R̃_k and ε (Theorem U1) for the slice class on `scan`'s rows with weights `excess`
/// (= l − θ, scaled), k sign vectors from `rng`, at level δ.
///
/// The sign vector lives in a bitset (n/8 bytes: in L1 cache for n up to ~2·10^5), and each
/// numeric feature's excess is laid out once in its sorted order, so a draw reads every
/// feature's data sequentially and looks up only sign bits at random.
pub fn uniform(scan: &Scanner, excess: &[f64], theta: f64, k: usize, delta: f64, rng: &mut Seeded) -> Uniform {
    if let Some(high) = two_valued(excess, theta) {
        return uniform_binary(&Binary { scan, excess, high, theta, k, delta }, rng);
    }
    let n = scan.n() as f64;
    let c0 = 0.5 - theta; // centre of [−θ, 1 − θ]
    let sorted: Vec<Vec<f64>> =
        scan.nums.iter().map(|f| f.order.iter().map(|&i| excess[i as usize]).collect()).collect();
    let mut bits = vec![0u64; scan.n().div_ceil(64)];
    let mut groups: Vec<f64> = Vec::new();
    let mut total = 0.0;
    for _ in 0..k {
        for b in bits.iter_mut() {
            *b = rng.next_u64();
        }
        if !scan.n().is_multiple_of(64) {
            let last = bits.len() - 1;
            bits[last] &= (1u64 << (scan.n() % 64)) - 1;
        }
        let ones: u32 = bits.iter().map(|b| b.count_ones()).sum();
        let sign_sum = 2.0 * f64::from(ones) - n;
        // ±e without a branch (random signs defeat branch prediction): flip e's sign bit when
        // the sign bit of the draw is 0.
        let signed = |i: u32, e: f64| -> f64 {
            let off = (bits[(i >> 6) as usize] >> (i & 63) & 1) ^ 1;
            f64::from_bits(e.to_bits() ^ (off << 63))
        };
        let mut best = 0.0_f64;
        for c in &scan.cats {
            // Four bin arrays, rows dealt round-robin: consecutive rows of the same category
            // no longer wait on each other's add.
            let m = c.labels.len();
            groups.clear();
            groups.resize(4 * m, 0.0);
            for (i, (&code, &e)) in c.codes.iter().zip(excess).enumerate() {
                groups[(i & 3) * m + code as usize] += signed(i as u32, e);
            }
            for g in 0..m {
                best = best.max(groups[g] + groups[m + g] + groups[2 * m + g] + groups[3 * m + g]);
            }
        }
        for (f, es) in scan.nums.iter().zip(&sorted) {
            groups.clear();
            let mut start = 0usize;
            for &end in &f.ends {
                let end = end as usize;
                // Four partial sums: a single running f64 sum is a chain of dependent adds.
                let mut acc = [0.0_f64; 4];
                let (ord, ex) = (&f.order[start..end], &es[start..end]);
                let split = ord.len() - ord.len() % 4;
                for (oc, ec) in ord[..split].chunks_exact(4).zip(ex[..split].chunks_exact(4)) {
                    for l in 0..4 {
                        acc[l] += signed(oc[l], ec[l]);
                    }
                }
                for (&i, &e) in ord[split..].iter().zip(&ex[split..]) {
                    acc[0] += signed(i, e);
                }
                groups.push((acc[0] + acc[1]) + (acc[2] + acc[3]));
                start = end;
            }
            best = best.max(max_prefix(&groups)).max(max_suffix(&groups)).max(max_subarray(&groups));
        }
        total += best / n - c0 * sign_sum / n;
    }
    let rademacher = total / k as f64;
    let deviation = 2.0 * rademacher + ((9.0 + 4.0 / k as f64) * (1.0 / delta).ln() / (2.0 * n)).sqrt();
    Uniform { rademacher, sign_draws: k, deviation }
}

/// ε of the variance-sensitive uniform bound (docs/methods.md §3.3: Bousquet's inequality for the
/// supremum, the self-bounding lower tail for the Rademacher average; BBM 2005, Thm 2.1 has the
/// same form) for the class {(l − θ)·1_S} (range width D = 1) on n rows, at level δ: with
/// probability ≥ 1 − δ, for every slice S, P g_S ≥ P_n g_S − ε. δ is spent as 2e^{−x} = δ/2 on
/// the two tails, δ/4 on replacing R_n by the k-draw average R̃_k (McDiarmid in the signs:
/// R_n ≤ R̃_k + sqrt(ln(4/δ)/(2nk))), and δ/4 on the kl upper bound μ⁺ of the window's mean
/// loss, which bounds every variance: Var g_S ≤ E(l − θ)² ≤ θ² + (1 − 2θ) μ for θ ≤ ½ (l² ≤ l),
/// ≤ θ² otherwise, and ≤ ¼ always. The bound holds for all α in (0, 1) at once, so the
/// smallest over a grid of α is taken:
///   ε = 2(1+α)/(1−α) R + sqrt(2σ²x/n) + (1/3 + 1/α + (1+α)/(2α(1−α))) x/n.
/// Tighter than Theorem U1 when σ² ≪ ¼ and n is large; looser with one sign draw.
pub fn variance_sensitive(u: &Uniform, n: usize, theta: f64, mean: f64, delta: f64) -> f64 {
    if n == 0 {
        return f64::INFINITY;
    }
    let nf = n as f64;
    let x = (4.0 / delta).ln();
    let r = u.rademacher.max(0.0) + ((4.0 / delta).ln() / (2.0 * nf * u.sign_draws.max(1) as f64)).sqrt();
    let mu = crate::estimate::kl::bounds(n as u64, mean.clamp(0.0, 1.0), delta / 4.0).upper;
    let sigma2 = if theta <= 0.5 { theta * theta + (1.0 - 2.0 * theta) * mu } else { theta * theta }.min(0.25);
    (1..100)
        .map(|i| {
            let a = f64::from(i) / 100.0;
            2.0 * (1.0 + a) / (1.0 - a) * r
                + (2.0 * sigma2 * x / nf).sqrt()
                + (1.0 / 3.0 + 1.0 / a + (1.0 + a) / (2.0 * a * (1.0 - a))) * x / nf
        })
        .fold(f64::INFINITY, f64::min)
}

/// `Some(1 − θ)` when every excess is −θ or 1 − θ (0-1 losses): the case the bit-sliced path
/// handles.
pub(super) fn two_valued(excess: &[f64], theta: f64) -> Option<f64> {
    let high = 1.0 - theta;
    excess.iter().all(|&e| e == high || e == -theta).then_some(high)
}

/// The localized diagnostic: the fixed point of ψ̂(r) = c1·φ_s(r) + c2·x/n, where φ_s(r) is the
/// single-sign supremum over the star hull {a·g_S : a ∈ [0, 1]} of the categorical and
/// threshold slices under P_n g² ≤ 2r (intervals are left out: their exact constrained supremum
/// is O(u²) per feature), by iteration from above (every iterate is conservative), and the
/// deviation (6K/B) r̂* + x (11 + 5BK)/n with K = 2, B = 1, x = ln(5/δ). Constants as recalled in
/// docs/methods.md §4.3: c1 = 20, c2 = c1 + 11.
#[derive(Clone, Debug, PartialEq)]
pub struct Localized {
    pub fixed_point: f64,
    pub deviation: f64,
    pub iterations: u32,
}

pub fn localized(scan: &Scanner, excess: &[f64], delta: f64, rng: &mut Seeded) -> Localized {
    let n = scan.n() as f64;
    let s: Vec<f64> = (0..scan.n()).map(|_| rng.sign()).collect();
    // Members of the (sub)class as (Σ s_i g_i, Σ g_i²) over the rows they hold, from the
    // scanner's codes and sorted tie groups (the single-feature categories only).
    let mut members: Vec<(f64, f64)> = Vec::new();
    for c in scan.cats.iter().filter(|c| c.labels.first().is_some_and(|l| l.len() == 1)) {
        let mut groups = vec![(0.0, 0.0); c.labels.len()];
        for (p, &code) in c.codes.iter().enumerate() {
            let e = &mut groups[code as usize];
            e.0 += s[p] * excess[p];
            e.1 += excess[p] * excess[p];
        }
        members.extend(groups);
    }
    for f in &scan.nums {
        let (ta, tq): (f64, f64) = f
            .order
            .iter()
            .fold((0.0, 0.0), |(x, y), &p| (x + s[p as usize] * excess[p as usize], y + excess[p as usize].powi(2)));
        let (mut a, mut q, mut start) = (0.0, 0.0, 0usize);
        for &end in &f.ends {
            for &p in &f.order[start..end as usize] {
                a += s[p as usize] * excess[p as usize];
                q += excess[p as usize] * excess[p as usize];
            }
            start = end as usize;
            members.push((a, q));
            members.push((ta - a, tq - q));
        }
    }
    let phi = |r: f64| -> f64 {
        members
            .iter()
            .map(|&(dot, sq)| {
                let scale = if sq <= 0.0 { 1.0 } else { (2.0 * r * n / sq).sqrt().min(1.0) };
                (scale * dot / n).max(0.0)
            })
            .fold(0.0, f64::max)
    };
    let (c1, x) = (20.0, (5.0 / delta).ln());
    let c2 = c1 + 11.0;
    let psi = |r: f64| c1 * phi(r) + c2 * x / n;
    let mut r = 1.0_f64.max(psi(1.0));
    let mut iterations = 0;
    for _ in 0..60 {
        let next = psi(r);
        iterations += 1;
        if next >= r * (1.0 - 1e-9) {
            break;
        }
        r = next;
    }
    let k = 2.0;
    Localized { fixed_point: r, deviation: 6.0 * k * r + x * (11.0 + 5.0 * k) / n, iterations }
}

/// A slice's bounds on held-out rows: Clopper-Pearson for 0-1 losses, betting otherwise.
pub fn confirm(losses: &[f64], binary: bool, delta: f64) -> Bounds {
    if losses.is_empty() {
        return Bounds::TRIVIAL;
    }
    if binary {
        let k = losses.iter().filter(|&&l| l >= 1.0).count() as u64;
        binomial::clopper_pearson(k, losses.len() as u64, delta)
    } else {
        betting::fixed_n(losses, delta)
    }
}
