//! The counting kernels of the uniform certificate for 0-1 losses: 64 sign draws at once,
//! bit-sliced, with an AVX-512 kernel where the CPU has one and a portable one everywhere.

use super::*;

/// Counters for 64 sign draws at once, bit-sliced: plane p holds bit p of each draw's count.
/// The portable counting kernel.
pub(super) struct Planes(Vec<u64>);

impl Planes {
    fn new(bits: usize) -> Planes {
        Planes(vec![0; bits])
    }
    /// Adds the 64 one-bit values of `x` (a ripple of carries; two planes on average).
    #[inline]
    fn add(&mut self, mut x: u64) {
        for p in self.0.iter_mut() {
            if x == 0 {
                break;
            }
            let carry = *p & x;
            *p ^= x;
            x = carry;
        }
    }
    /// The 64 counts.
    fn counts(&self, out: &mut [u32; 64]) {
        out.iter_mut().for_each(|c| *c = 0);
        for (p, &plane) in self.0.iter().enumerate() {
            let mut m = plane;
            while m != 0 {
                out[m.trailing_zeros() as usize] += 1 << p;
                m &= m - 1;
            }
        }
    }
}

/// For each of the 64 draws j, how many of `rows` have bit j of their word set.
pub(super) type CountBits = fn(words: &[u64], rows: &[u32], out: &mut [u32; 64]);

/// The portable kernel: bit-sliced counters, then one pass over their set bits.
pub(super) fn count_bits_portable(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
    let mut planes = Planes::new((usize::BITS - rows.len().leading_zeros()) as usize + 1);
    for &r in rows {
        planes.add(words[r as usize]);
    }
    planes.counts(out);
}

/// The AVX-512 kernel: the 64 counts live in two registers of 32 16-bit lanes, and each row is
/// two masked adds (its word is the mask), so a row costs a cycle or so whatever its bits are.
/// Lanes are emptied into `out` every 65,535 rows, before a 16-bit lane could overflow.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512bw")]
pub(super) fn count_bits_avx512_inner(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
    use std::arch::x86_64::{_mm512_mask_add_epi16, _mm512_set1_epi16, _mm512_setzero_si512, _mm512_storeu_si512};
    let one = _mm512_set1_epi16(1);
    out.iter_mut().for_each(|c| *c = 0);
    for chunk in rows.chunks(u16::MAX as usize) {
        let (mut lo, mut hi) = (_mm512_setzero_si512(), _mm512_setzero_si512());
        for &r in chunk {
            let w = words[r as usize];
            lo = _mm512_mask_add_epi16(lo, w as u32, lo, one);
            hi = _mm512_mask_add_epi16(hi, (w >> 32) as u32, hi, one);
        }
        let mut lanes = [0u16; 64];
        // SAFETY: `lanes` holds 64 u16 = two 512-bit stores, unaligned stores allowed.
        unsafe {
            _mm512_storeu_si512(lanes.as_mut_ptr().cast(), lo);
            _mm512_storeu_si512(lanes.as_mut_ptr().add(32).cast(), hi);
        }
        for (o, &l) in out.iter_mut().zip(&lanes) {
            *o += u32::from(l);
        }
    }
}

#[cfg(target_arch = "x86_64")]
pub(super) fn count_bits_avx512(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
    // SAFETY: only handed out by `count_bits_kernel` after the CPU was seen to have the
    // features the function is compiled for.
    unsafe { count_bits_avx512_inner(words, rows, out) }
}

/// True when this CPU runs the AVX-512 paths (detected once, then cached by std).
pub(super) fn has_avx512() -> bool {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx512f") && std::arch::is_x86_feature_detected!("avx512bw") {
        return true;
    }
    false
}

/// The fastest counting kernel this CPU runs. Both give the same integers, so results do not
/// depend on the machine (tested).
#[cfg(test)]
pub(super) fn count_bits_kernel() -> CountBits {
    #[cfg(target_arch = "x86_64")]
    if has_avx512() {
        return count_bits_avx512;
    }
    count_bits_portable
}

/// One feature's rows laid out for counting: group by group (a category, or a run of tied
/// values in sorted order), and inside each group the rows whose loss is 1 first.
pub(super) struct Grouped {
    pub(super) rows: Vec<u32>,
    /// Per group: (end of its loss-1 rows, end of the group), as positions in `rows`.
    pub(super) bounds: Vec<(u32, u32)>,
}

impl Grouped {
    /// A numeric feature's runs of tied values, in sorted order: each run split in place into
    /// its loss-1 rows, then the others, without a branch on the loss (random losses defeat
    /// branch prediction).
    fn by_value(f: &NumIndex, is_one: &[bool]) -> Grouped {
        let mut rows = vec![0u32; f.order.len()];
        let mut bounds = Vec::with_capacity(f.ends.len());
        let mut start = 0usize;
        for &end in &f.ends {
            let end = end as usize;
            let group = &f.order[start..end];
            let ones = group.iter().filter(|&&r| is_one[r as usize]).count();
            let (mut a, mut b) = (start, start + ones);
            for &r in group {
                let one = usize::from(is_one[r as usize]);
                rows[if one == 1 { a } else { b }] = r;
                a += one;
                b += 1 - one;
            }
            bounds.push(((start + ones) as u32, end as u32));
            start = end;
        }
        Grouped { rows, bounds }
    }

    /// The rows of each code, in code order: a counting sort on 2·code + (loss is 0), so each
    /// code's loss-1 rows come first. Stable, O(n + codes).
    fn by_code(codes: &[u32], m: usize, is_one: &[bool]) -> Grouped {
        let key = |i: usize, c: u32| 2 * c as usize + usize::from(!is_one[i]);
        let mut next = vec![0u32; 2 * m + 1];
        for (i, &c) in codes.iter().enumerate() {
            next[key(i, c) + 1] += 1;
        }
        for b in 1..next.len() {
            next[b] += next[b - 1];
        }
        let bounds = (0..m).map(|g| (next[2 * g + 1], next[2 * g + 2])).collect();
        let mut rows = vec![0u32; codes.len()];
        for (i, &c) in codes.iter().enumerate() {
            let slot = &mut next[key(i, c)];
            rows[*slot as usize] = i as u32;
            *slot += 1;
        }
        Grouped { rows, bounds }
    }

    /// Calls `f` with each group's sums Σ_{i∈g} e_i s_i for the 64 draws of `words`, in
    /// group order. With c the rows of each loss value whose sign is +, n all of them:
    /// Σ = (1 − θ)(2 c₁ − n₁) − θ (2 c₀ − n₀).
    #[inline(always)]
    fn sums(&self, words: &[u64], high: f64, theta: f64, count: CountBits, mut f: impl FnMut(&[f64; 64])) {
        let (mut c1, mut c0) = ([0u32; 64], [0u32; 64]);
        let mut g = [0.0_f64; 64];
        let mut start = 0usize;
        for &(mid, end) in &self.bounds {
            let (mid, end) = (mid as usize, end as usize);
            count(words, &self.rows[start..mid], &mut c1);
            count(words, &self.rows[mid..end], &mut c0);
            let (n1, n0) = ((mid - start) as f64, (end - mid) as f64);
            for j in 0..64 {
                g[j] = high * (2.0 * f64::from(c1[j]) - n1) - theta * (2.0 * f64::from(c0[j]) - n0);
            }
            f(&g);
            start = end;
        }
    }
}

/// [`uniform`] for 0-1 losses: 64 sign draws at a time. Row i's signs for the 64 draws of a
/// block are the bits of one word, so a pass over a feature's rows counts, per group and loss
/// value, the rows with a + sign in every draw at once (see [`Grouped::sums`]) instead of
/// adding 64 signed numbers per row.
pub(super) fn uniform_binary(job: &Binary<'_>, rng: &mut Seeded) -> Uniform {
    #[cfg(target_arch = "x86_64")]
    if has_avx512() {
        // SAFETY: the CPU has the features the function is compiled for.
        return unsafe { uniform_binary_avx512(job, rng) };
    }
    uniform_binary_with(job, rng, count_bits_portable)
}

/// What [`uniform_binary`] works on: the scanner's rows, their excess l − θ (each −θ or
/// `high` = 1 − θ), and k draws at level δ.
pub(super) struct Binary<'a> {
    pub(super) scan: &'a Scanner,
    pub(super) excess: &'a [f64],
    pub(super) high: f64,
    pub(super) theta: f64,
    pub(super) k: usize,
    pub(super) delta: f64,
}

/// The same computation compiled for AVX-512, so the 64-draw loops over f64 (group sums,
/// prefixes, Kadane) run eight lanes at a time. IEEE arithmetic lane by lane: the results are
/// the portable build's to the bit (tested).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512bw")]
pub(super) fn uniform_binary_avx512(job: &Binary<'_>, rng: &mut Seeded) -> Uniform {
    uniform_binary_with(job, rng, count_bits_avx512)
}

#[inline(always)]
pub(super) fn uniform_binary_with(job: &Binary<'_>, rng: &mut Seeded, count: CountBits) -> Uniform {
    let Binary { scan, excess, high, theta, k, delta } = *job;
    let n = scan.n();
    let nf = n as f64;
    let c0 = 0.5 - theta;
    let is_one: Vec<bool> = excess.iter().map(|&e| e == high).collect();
    // The layouts depend on the losses only, so they are built once for every draw.
    let cats: Vec<Grouped> = scan.cats.iter().map(|c| Grouped::by_code(&c.codes, c.labels.len(), &is_one)).collect();
    let nums: Vec<Grouped> = scan.nums.iter().map(|f| Grouped::by_value(f, &is_one)).collect();
    let all: Vec<u32> = (0..n as u32).collect();
    let mut words = vec![0u64; n];
    let mut positives = [0u32; 64];
    let mut total = 0.0;
    let mut done = 0;
    while done < k {
        let take = (k - done).min(64);
        for w in words.iter_mut() {
            *w = rng.next_u64();
        }
        let mut best = [0.0_f64; 64];
        // Σ_i s_i per draw: 2·(positive signs) − n.
        count(&words, &all, &mut positives);
        for c in &cats {
            c.sums(&words, high, theta, count, |g| {
                for j in 0..64 {
                    best[j] = best[j].max(g[j]);
                }
            });
        }
        for f in &nums {
            let (mut prefix, mut min_p, mut max_p, mut run, mut kad) =
                ([0.0_f64; 64], [0.0_f64; 64], [0.0_f64; 64], [0.0_f64; 64], [0.0_f64; 64]);
            f.sums(&words, high, theta, count, |g| {
                for j in 0..64 {
                    prefix[j] += g[j];
                    max_p[j] = max_p[j].max(prefix[j]);
                    min_p[j] = min_p[j].min(prefix[j]);
                    run[j] = (run[j] + g[j]).max(0.0);
                    kad[j] = kad[j].max(run[j]);
                }
            });
            for j in 0..64 {
                best[j] = best[j].max(max_p[j]).max(prefix[j] - min_p[j]).max(kad[j]);
            }
        }
        for j in 0..take {
            total += best[j] / nf - c0 * (2.0 * f64::from(positives[j]) - nf) / nf;
        }
        done += take;
    }
    let rademacher = total / k as f64;
    let deviation = 2.0 * rademacher + ((9.0 + 4.0 / k as f64) * (1.0 / delta).ln() / (2.0 * nf)).sqrt();
    Uniform { rademacher, sign_draws: k, deviation }
}
