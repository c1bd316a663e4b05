//! Slices of a window: the scan for the worst ones and the certificates that survive the
//! selection (Bartlett & Mendelson 2002; Bartlett, Bousquet & Mendelson 2005). Pure: rows in, numbers out; signs and splits come from
//! a recorded seed, so every result can be reproduced.
//!
//! The class. For categorical features every value, and conjunctions of up to `depth` of them;
//! for numeric features every threshold {x ≤ t}, {x > t} and interval {a < x ≤ b}, ties grouped
//! (the class restricted to the sample only tells unique values apart). The slice functions are
//! g_S(z) = (l − θ)·1_S(x) with losses scaled to [0, 1]: range [−θ, 1 − θ], width D = 1.
//!
//! The scan (§3.4 a): for a weight vector w, sup_S Σ_{i∈S} w_i is a max group sum (categories),
//! a max prefix or suffix sum (thresholds) or a max subarray (intervals, Kadane) over the unique
//! values in sorted order: O(n) per feature after one sort, O(d·n·(log n + k)) for k weight
//! vectors. The same code computes the scan statistic (w = l − θ) and each Rademacher supremum
//! (w = s·(l − θ)).
//!
//! The certificates, each valid for how the slice was found:
//! - `split-confirm`: discover on a seeded half, confirm on the other half with the exact
//!   binomial bound (0-1 loss) or betting (bounded loss), at δ_split / K over the K slices kept;
//! - `uniform` (Theorem U1 of §3.2, McDiarmid over sample and signs): with probability ≥ 1 − δ,
//!   for every S at once, P g_S ≥ P_n g_S − ε with ε = 2 R̃_k + sqrt((9 + 4/k) ln(1/δ) / (2n)).
//!   P g_S = P(S)(R(S) − θ) > 0 means R(S) > θ, and since P(S) ≤ 1 the risk of S is at least
//!   θ + (P_n g_S − ε) whenever that is positive.
//! - `localized`: the fixed point of a sub-root function built from one sign vector (§4.3). Its
//!   constants are recalled, not confirmed against Bartlett, Bousquet & Mendelson (2005,
//!   Ann. Statist. 33(4), Theorem 4.1), so it is reported as a diagnostic and never certifies.

use std::collections::HashMap;

use super::{betting, binomial, Bounds};

/// A slice of the window, as reported.
#[derive(Clone, Debug, PartialEq)]
pub enum Slice {
    Category {
        feature: String,
        value: String,
    },
    Conjunction {
        parts: Vec<(String, String)>,
    },
    /// {x ≤ high} when `low` is None, {x > low} when `high` is None.
    Threshold {
        feature: String,
        low: Option<f64>,
        high: Option<f64>,
    },
    /// {low < x ≤ high}.
    Interval {
        feature: String,
        low: f64,
        high: f64,
    },
}

impl Slice {
    pub fn kind(&self) -> &'static str {
        match self {
            Slice::Category { .. } => "category",
            Slice::Conjunction { .. } => "conjunction",
            Slice::Threshold { .. } => "threshold",
            Slice::Interval { .. } => "interval",
        }
    }

    /// The feature (for a conjunction, its features joined by `&`).
    pub fn feature(&self) -> String {
        match self {
            Slice::Category { feature, .. } | Slice::Threshold { feature, .. } | Slice::Interval { feature, .. } => {
                feature.clone()
            }
            Slice::Conjunction { parts } => parts.iter().map(|(f, _)| f.as_str()).collect::<Vec<_>>().join("&"),
        }
    }

    /// A short human description, e.g. `region=north-east`, `0.3 < weight_kg <= 0.4`.
    pub fn describe(&self) -> String {
        match self {
            Slice::Category { feature, value } => format!("{feature}={value}"),
            Slice::Conjunction { parts } => {
                parts.iter().map(|(f, v)| format!("{f}={v}")).collect::<Vec<_>>().join(" & ")
            }
            Slice::Threshold { feature, low: None, high: Some(h) } => format!("{feature} <= {h}"),
            Slice::Threshold { feature, low: Some(l), .. } => format!("{feature} > {l}"),
            Slice::Threshold { feature, .. } => format!("{feature} (all)"),
            Slice::Interval { feature, low, high } => format!("{low} < {feature} <= {high}"),
        }
    }
}

/// The rows of a window: scaled losses and feature values.
#[derive(Clone, Debug, Default)]
pub struct Table {
    /// Losses scaled to [0, 1].
    pub losses: Vec<f64>,
    /// (name, value per row) of each categorical feature.
    pub categorical: Vec<(String, Vec<String>)>,
    /// (name, value per row) of each numeric feature (finite values).
    pub numeric: Vec<(String, Vec<f64>)>,
}

/// A categorical feature (or a conjunction) coded densely.
struct CatIndex {
    /// (feature, value) parts of each code's slice.
    labels: Vec<Vec<(String, String)>>,
    codes: Vec<u32>,
}

/// A numeric feature: rows in sorted order, and where each run of tied values ends.
struct NumIndex {
    name: String,
    order: Vec<u32>,
    /// ends[g] = one past the last position (in `order`) of unique value g.
    ends: Vec<u32>,
    values: Vec<f64>,
}

/// The sorted and grouped view of a set of rows, reused for every weight vector.
pub struct Scanner {
    n: usize,
    cats: Vec<CatIndex>,
    nums: Vec<NumIndex>,
}

/// The best slice of one family for a weight vector, and its sum.
#[derive(Clone, Debug)]
pub struct Found {
    pub slice: Slice,
    pub sum: f64,
}

fn combos(m: usize, depth: usize) -> Vec<Vec<usize>> {
    let mut out: Vec<Vec<usize>> = Vec::new();
    fn rec(start: usize, m: usize, left: usize, cur: &mut Vec<usize>, out: &mut Vec<Vec<usize>>) {
        if !cur.is_empty() {
            out.push(cur.clone());
        }
        if left == 0 {
            return;
        }
        for j in start..m {
            cur.push(j);
            rec(j + 1, m, left - 1, cur, out);
            cur.pop();
        }
    }
    rec(0, m, depth, &mut Vec::new(), &mut out);
    out
}

/// A u64 whose unsigned order is `f64::total_cmp`'s order (sign bit flipped for positives,
/// every bit for negatives).
fn total_order_key(v: f64) -> u64 {
    let b = v.to_bits();
    if b >> 63 == 1 {
        !b
    } else {
        b | 1 << 63
    }
}

/// Codes items densely in order of first appearance: (code of each, the distinct items), with
/// an open-addressing table (linear probing) that starts at 2^`bits` slots, in L1 cache, and
/// doubles at a quarter load so clusters stay short. `None` when more than `limit` items are
/// distinct, or when a probe runs past 64 slots (items built to collide): callers then take a
/// path whose cost no input can inflate, so hostile values cost time linear in the rows.
/// Codes depend only on the order of the items, never on the hash.
fn dense_codes<K: Copy>(
    items: impl Iterator<Item = K>,
    hash: impl Fn(K) -> u64,
    same: impl Fn(K, K) -> bool,
    limit: usize,
    mut bits: u32,
) -> Option<(Vec<u32>, Vec<K>)> {
    const EMPTY: u32 = u32::MAX;
    const MAX_PROBE: usize = 64;
    let mut slots = vec![(0u64, EMPTY); 1 << bits]; // (hash, code)
    let mut distinct: Vec<(K, u64)> = Vec::new();
    let mut codes = Vec::with_capacity(items.size_hint().0);
    for k in items {
        let hk = hash(k);
        let mask = (1usize << bits) - 1;
        let mut at = (hk >> (64 - bits)) as usize;
        let mut probes = 0;
        let code = loop {
            let (sh, code) = slots[at];
            if code == EMPTY {
                if distinct.len() >= limit {
                    return None;
                }
                slots[at] = (hk, distinct.len() as u32);
                distinct.push((k, hk));
                break distinct.len() as u32 - 1;
            }
            if sh == hk && same(distinct[code as usize].0, k) {
                break code;
            }
            probes += 1;
            if probes > MAX_PROBE {
                return None;
            }
            at = (at + 1) & mask;
        };
        codes.push(code);
        if 4 * distinct.len() > 1 << bits {
            bits += 1;
            let mask = (1usize << bits) - 1;
            slots = vec![(0u64, EMPTY); 1 << bits];
            for (code, &(_, hk)) in distinct.iter().enumerate() {
                let mut at = (hk >> (64 - bits)) as usize;
                while slots[at].1 != EMPTY {
                    at = (at + 1) & mask;
                }
                slots[at] = (hk, code as u32);
            }
        }
    }
    Some((codes, distinct.into_iter().map(|(k, _)| k).collect()))
}

/// Codes strings densely in order of first appearance: (code of each, the distinct strings),
/// through [`dense_codes`] with a seeded multiply-xor hash over 8-byte words: a few ns a row,
/// where std's SipHash map costs ~15. `None` as there (the caller then codes with SipHash).
fn code_strings<'a>(values: impl Iterator<Item = &'a str>) -> Option<(Vec<u32>, Vec<String>)> {
    use std::hash::BuildHasher;
    thread_local!(static SEED: u64 = std::collections::hash_map::RandomState::new().hash_one(0x5eed_u64));
    let seed = SEED.with(|s| *s);
    let hash = |v: &str| -> u64 {
        let mut h = seed ^ v.len() as u64;
        let mut chunks = v.as_bytes().chunks_exact(8);
        for c in &mut chunks {
            h = (h.rotate_left(5) ^ u64::from_le_bytes(c.try_into().expect("8 bytes")))
                .wrapping_mul(0x9E37_79B9_7F4A_7C15);
        }
        // The last 0-7 bytes by a loop: copy_from_slice of a variable length is a memcpy call.
        let last = chunks.remainder().iter().enumerate().fold(0u64, |w, (i, &c)| w | u64::from(c) << (8 * i));
        h = (h.rotate_left(5) ^ last).wrapping_mul(0x9E37_79B9_7F4A_7C15);
        // MurmurHash3's 64-bit finaliser: every input bit reaches the top bits the table uses.
        h ^= h >> 33;
        h = h.wrapping_mul(0xFF51_AFD7_ED55_8CCD);
        h ^= h >> 33;
        h = h.wrapping_mul(0xC4CE_B9FE_1A85_EC53);
        h ^ (h >> 33)
    };
    let (codes, names) = dense_codes(values, hash, same_str, usize::MAX, 6)?;
    Some((codes, names.into_iter().map(str::to_string).collect()))
}

/// String equality without a call to memcmp for the short strings categories usually are
/// (a byte loop; memcmp's call costs more than comparing a few bytes).
#[inline]
fn same_str(a: &str, b: &str) -> bool {
    let (a, b) = (a.as_bytes(), b.as_bytes());
    if a.len() != b.len() {
        return false;
    }
    if a.len() <= 16 {
        return a.iter().zip(b).all(|(x, y)| x == y);
    }
    a == b
}

/// [`code_strings`] with std's SipHash map: the fallback whose cost no input can inflate.
fn code_strings_sip<'a>(values: impl Iterator<Item = &'a str>) -> (Vec<u32>, Vec<String>) {
    let mut index: HashMap<&str, u32> = HashMap::new();
    let mut names = Vec::new();
    let codes = values
        .map(|v| {
            *index.entry(v).or_insert_with(|| {
                names.push(v.to_string());
                names.len() as u32 - 1
            })
        })
        .collect();
    (codes, names)
}

/// The inverse of [`total_order_key`].
fn from_total_order_key(k: u64) -> f64 {
    f64::from_bits(if k >> 63 == 1 { k & !(1 << 63) } else { !k })
}

/// Sorts (key, payload) pairs by key, stably: least-significant-byte radix sort, one
/// histogram pass for all eight bytes, and no pass for a byte every key shares (a feature's
/// values in [0, 1] share their top bytes). O(n) per byte, where a comparison sort is
/// O(n log n) with a branch per comparison that ties and random data both mispredict.
fn radix_sorted(mut a: Vec<(u64, u32)>) -> Vec<(u64, u32)> {
    let n = a.len();
    let mut counts = vec![[0usize; 256]; 8];
    for &(k, _) in &a {
        for (d, c) in counts.iter_mut().enumerate() {
            c[(k >> (8 * d)) as usize & 255] += 1;
        }
    }
    let mut b = vec![(0u64, 0u32); n];
    for (d, c) in counts.iter().enumerate() {
        if c.contains(&n) {
            continue; // every key has the same byte here
        }
        let mut next = [0usize; 256];
        let mut sum = 0;
        for (slot, &x) in next.iter_mut().zip(c) {
            *slot = sum;
            sum += x;
        }
        for &(k, p) in &a {
            let digit = (k >> (8 * d)) as usize & 255;
            b[next[digit]] = (k, p);
            next[digit] += 1;
        }
        std::mem::swap(&mut a, &mut b);
    }
    a
}

/// A numeric feature's index: positions in sorted order, where each run of equal values ends
/// in it, and the distinct values (−0 and +0 are one value, as f64 equality has it).
type NumGroups = (Vec<u32>, Vec<u32>, Vec<f64>);

/// [`NumGroups`] from (key, position) pairs sorted by key.
fn groups_of_sorted(sorted: &[(u64, u32)]) -> NumGroups {
    let mut order = Vec::with_capacity(sorted.len());
    let mut ends = Vec::new();
    let mut uniq: Vec<f64> = Vec::new();
    let mut last_key = None;
    for (pos, &(k, p)) in sorted.iter().enumerate() {
        if last_key != Some(k) {
            last_key = Some(k);
            let v = from_total_order_key(k);
            if uniq.last() != Some(&v) {
                if !uniq.is_empty() {
                    ends.push(pos as u32);
                }
                uniq.push(v);
            }
        }
        order.push(p);
    }
    if !uniq.is_empty() {
        ends.push(sorted.len() as u32);
    }
    (order, ends, uniq)
}

/// [`NumGroups`] for the common case of heavily tied values (rounded amounts, small
/// integers), equal to [`groups_of_sorted`] of the stable sort: the distinct keys are found
/// with [`dense_codes`] and sorted among themselves, and the positions dealt into their groups
/// by a counting sort, O(n) in all. `None` when more than n/8 keys are distinct, or when the
/// table's probes run long (keys chosen to collide): the radix sort is then the better tool,
/// and its time does not depend on the keys.
fn few_distinct_groups(keys: &[u64]) -> Option<NumGroups> {
    // Multiply-shift (Fibonacci) hashing: the table uses the product's top bits.
    let (code_of_row, distinct) = dense_codes(
        keys.iter().copied(),
        |k| k.wrapping_mul(0x9E37_79B9_7F4A_7C15),
        |a, b| a == b,
        keys.len() / 8,
        10,
    )?;
    let mut by_key: Vec<u32> = (0..distinct.len() as u32).collect();
    by_key.sort_unstable_by_key(|&c| distinct[c as usize]);
    // Positions are dealt by code in key order (so −0's rows come before +0's, as in the
    // sort); a group ends where the value changes (−0 and +0 are one group).
    let mut rank_of = vec![0u32; distinct.len()];
    for (r, &c) in by_key.iter().enumerate() {
        rank_of[c as usize] = r as u32;
    }
    let mut next = vec![0u32; distinct.len() + 1];
    for &c in &code_of_row {
        next[rank_of[c as usize] as usize + 1] += 1;
    }
    for r in 1..next.len() {
        next[r] += next[r - 1];
    }
    let mut values: Vec<f64> = Vec::new();
    let mut ends: Vec<u32> = Vec::new();
    for (r, &c) in by_key.iter().enumerate() {
        let v = from_total_order_key(distinct[c as usize]);
        if values.last() == Some(&v) {
            *ends.last_mut().expect("a group before") = next[r + 1];
        } else {
            values.push(v);
            ends.push(next[r + 1]);
        }
    }
    let mut order = vec![0u32; keys.len()];
    for (p, &c) in code_of_row.iter().enumerate() {
        let slot = &mut next[rank_of[c as usize] as usize];
        order[*slot as usize] = p as u32;
        *slot += 1;
    }
    Some((order, ends, values))
}

impl Scanner {
    /// Indexes the rows `rows` of `t` (all rows when `rows` is None); conjunctions of up to
    /// `depth` categorical features become features of their own.
    pub fn new(t: &Table, rows: Option<&[u32]>, depth: usize) -> Scanner {
        let all: Vec<u32>;
        let rows = match rows {
            Some(r) => r,
            None => {
                all = (0..t.losses.len() as u32).collect();
                &all
            }
        };
        // Each categorical feature coded once (no allocation per row); a conjunction's code is
        // composed from its parts' codes.
        let mut single: Vec<(Vec<u32>, Vec<String>)> = t
            .categorical
            .iter()
            .map(|(_, values)| {
                let cell = |r: &u32| values[*r as usize].as_str();
                code_strings(rows.iter().map(cell)).unwrap_or_else(|| code_strings_sip(rows.iter().map(cell)))
            })
            .collect();
        let mut cats = Vec::new();
        for combo in combos(t.categorical.len(), depth.max(1)) {
            if let [c] = combo[..] {
                // A single feature: its codes as they are (moved when no conjunction needs them).
                let labels = single[c].1.iter().map(|v| vec![(t.categorical[c].0.clone(), v.clone())]).collect();
                let codes = if depth <= 1 { std::mem::take(&mut single[c].0) } else { single[c].0.clone() };
                cats.push(CatIndex { labels, codes });
                continue;
            }
            let mut index: HashMap<u64, u32> = HashMap::new();
            let mut labels: Vec<Vec<(String, String)>> = Vec::new();
            let mut codes = Vec::with_capacity(rows.len());
            for p in 0..rows.len() {
                let key =
                    combo.iter().fold(0u64, |acc, &c| acc * (single[c].1.len() as u64 + 1) + u64::from(single[c].0[p]));
                let next = index.len() as u32;
                let code = *index.entry(key).or_insert_with(|| {
                    labels.push(
                        combo
                            .iter()
                            .map(|&c| (t.categorical[c].0.clone(), single[c].1[single[c].0[p] as usize].clone()))
                            .collect(),
                    );
                    next
                });
                codes.push(code);
            }
            cats.push(CatIndex { labels, codes });
        }
        let mut nums = Vec::new();
        for (name, values) in &t.numeric {
            let keys: Vec<u64> = rows.iter().map(|&r| total_order_key(values[r as usize])).collect();
            let (order, ends, uniq) = few_distinct_groups(&keys).unwrap_or_else(|| {
                groups_of_sorted(&radix_sorted(keys.iter().zip(0u32..).map(|(&k, p)| (k, p)).collect()))
            });
            nums.push(NumIndex { name: name.clone(), order, ends, values: uniq });
        }
        Scanner { n: rows.len(), cats, nums }
    }

    pub fn n(&self) -> usize {
        self.n
    }

    /// sup over the whole class of Σ_{i∈S} w_i (≥ 0: the empty slice is in the class), the
    /// plain definition: the fast paths of [`uniform`] are tested against it. `w` is
    /// indexed by position in the scanner's rows. `scratch` is reused between calls.
    pub fn sup(&self, w: &[f64], scratch: &mut Vec<f64>) -> f64 {
        let mut best = 0.0_f64;
        for c in &self.cats {
            scratch.clear();
            scratch.resize(c.labels.len(), 0.0);
            for (&code, &wi) in c.codes.iter().zip(w) {
                scratch[code as usize] += wi;
            }
            best = scratch.iter().fold(best, |b, &s| b.max(s));
        }
        let mut groups = Vec::new();
        for f in &self.nums {
            groups.clear();
            let mut start = 0usize;
            for &end in &f.ends {
                groups.push(f.order[start..end as usize].iter().map(|&i| w[i as usize]).sum::<f64>());
                start = end as usize;
            }
            best = best.max(max_prefix(&groups)).max(max_suffix(&groups)).max(max_subarray(&groups));
        }
        best
    }

    /// Candidate slices for weight vector `w`: every category and conjunction, and per numeric
    /// feature the best lower threshold, upper threshold and interval; sorted by sum, best first.
    pub fn candidates(&self, w: &[f64]) -> Vec<Found> {
        let mut out = Vec::new();
        for c in &self.cats {
            let mut sums = vec![0.0; c.labels.len()];
            for (&code, &wi) in c.codes.iter().zip(w) {
                sums[code as usize] += wi;
            }
            for (parts, sum) in c.labels.iter().zip(sums) {
                let slice = if parts.len() == 1 {
                    Slice::Category { feature: parts[0].0.clone(), value: parts[0].1.clone() }
                } else {
                    Slice::Conjunction { parts: parts.clone() }
                };
                out.push(Found { slice, sum });
            }
        }
        for f in &self.nums {
            let u = f.values.len();
            if u == 0 {
                continue;
            }
            let mut start = 0usize;
            let mut prefix = vec![0.0; u + 1];
            for (g, &end) in f.ends.iter().enumerate() {
                prefix[g + 1] = prefix[g] + f.order[start..end as usize].iter().map(|&i| w[i as usize]).sum::<f64>();
                start = end as usize;
            }
            let total = prefix[u];
            // Lower thresholds {x <= values[k-1]} for k in 1..u (k = u is the whole window).
            if let Some(k) = (1..u).max_by(|&a, &b| prefix[a].total_cmp(&prefix[b])) {
                out.push(Found {
                    slice: Slice::Threshold { feature: f.name.clone(), low: None, high: Some(f.values[k - 1]) },
                    sum: prefix[k],
                });
                let j = (1..u).min_by(|&a, &b| prefix[a].total_cmp(&prefix[b])).expect("u > 1");
                out.push(Found {
                    slice: Slice::Threshold { feature: f.name.clone(), low: Some(f.values[j - 1]), high: None },
                    sum: total - prefix[j],
                });
            }
            // Intervals (values[i-1], values[k-1]] = prefix[k] - prefix[i], 1 <= i < k <= u.
            let (mut best, mut arg, mut min_i) = (f64::NEG_INFINITY, (1, 2), 1usize);
            for k in 2..=u {
                if prefix[k - 1] < prefix[min_i] {
                    min_i = k - 1;
                }
                if prefix[k] - prefix[min_i] > best {
                    best = prefix[k] - prefix[min_i];
                    arg = (min_i, k);
                }
            }
            if u >= 2 {
                out.push(Found {
                    slice: Slice::Interval {
                        feature: f.name.clone(),
                        low: f.values[arg.0 - 1],
                        high: f.values[arg.1 - 1],
                    },
                    sum: best,
                });
            }
        }
        out.sort_by(|a, b| b.sum.total_cmp(&a.sum));
        out
    }
}

/// max(0, max_k Σ_{j≤k} g_j): the best lower threshold {x ≤ t} (the empty slice included).
pub fn max_prefix(g: &[f64]) -> f64 {
    let (mut p, mut best) = (0.0_f64, 0.0_f64);
    for &x in g {
        p += x;
        best = best.max(p);
    }
    best
}

/// max(0, max_k Σ_{j>k} g_j): the best upper threshold {x > t}.
pub fn max_suffix(g: &[f64]) -> f64 {
    let (mut p, mut best) = (0.0_f64, 0.0_f64);
    for &x in g.iter().rev() {
        p += x;
        best = best.max(p);
    }
    best
}

/// max(0, max_{i≤k} Σ_{i<j≤k} g_j): the best interval (Kadane's algorithm, one pass).
pub fn max_subarray(g: &[f64]) -> f64 {
    let (mut run, mut best) = (0.0_f64, 0.0_f64);
    for &x in g {
        run = (run + x).max(0.0);
        best = best.max(run);
    }
    best
}

/// True when row `r` of `t` is in `s`.
pub fn contains(t: &Table, s: &Slice, r: usize) -> bool {
    let cat = |f: &str, v: &str| t.categorical.iter().find(|c| c.0 == f).is_some_and(|c| c.1[r] == v);
    let num = |f: &str| t.numeric.iter().find(|c| c.0 == f).map(|c| c.1[r]);
    match s {
        Slice::Category { feature, value } => cat(feature, value),
        Slice::Conjunction { parts } => parts.iter().all(|(f, v)| cat(f, v)),
        Slice::Threshold { feature, low, high } => {
            num(feature).is_some_and(|x| low.is_none_or(|l| x > l) && high.is_none_or(|h| x <= h))
        }
        Slice::Interval { feature, low, high } => num(feature).is_some_and(|x| x > *low && x <= *high),
    }
}

/// A small seeded generator (SplitMix64): signs and splits are reproducible from the seed.
pub struct Seeded(u64);

impl Seeded {
    pub fn new(seed: u64) -> Seeded {
        Seeded(seed)
    }
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    pub fn sign(&mut self) -> f64 {
        if self.next_u64() >> 63 == 0 {
            -1.0
        } else {
            1.0
        }
    }
}

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

/// ε of the variance-sensitive uniform bound (METHODS.md §3.3: Bousquet's inequality for the
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
    let mu = super::kl::bounds(n as u64, mean.clamp(0.0, 1.0), delta / 4.0).upper;
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
fn two_valued(excess: &[f64], theta: f64) -> Option<f64> {
    let high = 1.0 - theta;
    excess.iter().all(|&e| e == high || e == -theta).then_some(high)
}

/// Counters for 64 sign draws at once, bit-sliced: plane p holds bit p of each draw's count.
/// The portable counting kernel.
struct Planes(Vec<u64>);

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
type CountBits = fn(words: &[u64], rows: &[u32], out: &mut [u32; 64]);

/// The portable kernel: bit-sliced counters, then one pass over their set bits.
fn count_bits_portable(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
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
fn count_bits_avx512_inner(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
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
fn count_bits_avx512(words: &[u64], rows: &[u32], out: &mut [u32; 64]) {
    // SAFETY: only handed out by `count_bits_kernel` after the CPU was seen to have the
    // features the function is compiled for.
    unsafe { count_bits_avx512_inner(words, rows, out) }
}

/// True when this CPU runs the AVX-512 paths (detected once, then cached by std).
fn has_avx512() -> bool {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx512f") && std::arch::is_x86_feature_detected!("avx512bw") {
        return true;
    }
    false
}

/// The fastest counting kernel this CPU runs. Both give the same integers, so results do not
/// depend on the machine (tested).
#[cfg(test)]
fn count_bits_kernel() -> CountBits {
    #[cfg(target_arch = "x86_64")]
    if has_avx512() {
        return count_bits_avx512;
    }
    count_bits_portable
}

/// One feature's rows laid out for counting: group by group (a category, or a run of tied
/// values in sorted order), and inside each group the rows whose loss is 1 first.
struct Grouped {
    rows: Vec<u32>,
    /// Per group: (end of its loss-1 rows, end of the group), as positions in `rows`.
    bounds: Vec<(u32, u32)>,
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
fn uniform_binary(job: &Binary<'_>, rng: &mut Seeded) -> Uniform {
    #[cfg(target_arch = "x86_64")]
    if has_avx512() {
        // SAFETY: the CPU has the features the function is compiled for.
        return unsafe { uniform_binary_avx512(job, rng) };
    }
    uniform_binary_with(job, rng, count_bits_portable)
}

/// What [`uniform_binary`] works on: the scanner's rows, their excess l − θ (each −θ or
/// `high` = 1 − θ), and k draws at level δ.
struct Binary<'a> {
    scan: &'a Scanner,
    excess: &'a [f64],
    high: f64,
    theta: f64,
    k: usize,
    delta: f64,
}

/// The same computation compiled for AVX-512, so the 64-draw loops over f64 (group sums,
/// prefixes, Kadane) run eight lanes at a time. IEEE arithmetic lane by lane: the results are
/// the portable build's to the bit (tested).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512bw")]
fn uniform_binary_avx512(job: &Binary<'_>, rng: &mut Seeded) -> Uniform {
    uniform_binary_with(job, rng, count_bits_avx512)
}

#[inline(always)]
fn uniform_binary_with(job: &Binary<'_>, rng: &mut Seeded, count: CountBits) -> Uniform {
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

/// The localized diagnostic: the fixed point of ψ̂(r) = c1·φ_s(r) + c2·x/n, where φ_s(r) is the
/// single-sign supremum over the star hull {a·g_S : a ∈ [0, 1]} of the categorical and
/// threshold slices under P_n g² ≤ 2r (intervals are left out: their exact constrained supremum
/// is O(u²) per feature), by iteration from above (every iterate is conservative), and the
/// deviation (6K/B) r̂* + x (11 + 5BK)/n with K = 2, B = 1, x = ln(5/δ). Constants as recalled in
/// METHODS.md §4.3: c1 = 20, c2 = c1 + 11.
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

#[cfg(test)]
mod tests;

/// What one analysis asks for.
#[derive(Clone, Debug)]
pub struct Plan {
    /// θ scaled to [0, 1].
    pub theta: f64,
    /// Total error probability: half to split-confirm, half to the uniform certificate.
    pub delta: f64,
    pub top: usize,
    pub seed: u64,
    pub sign_draws: usize,
    pub depth: usize,
}

/// One reported slice, in loss units scaled to [0, 1].
#[derive(Clone, Debug)]
pub struct SliceReport {
    pub slice: Slice,
    /// Rows of the whole window in the slice, and their mean loss.
    pub n: u64,
    pub mean: f64,
    pub lower: f64,
    pub upper: f64,
    /// "split-confirm" or "uniform": the certificate behind `lower`/`upper`.
    pub certified_by: &'static str,
    pub violates_sla: bool,
}

/// The analysis of one window.
#[derive(Clone, Debug)]
pub struct Report {
    pub n: usize,
    /// Theorem U1 at half the uniform δ.
    pub uniform: Uniform,
    /// ε of the variance-sensitive form (METHODS.md §3.3) at the other half.
    pub variance_deviation: f64,
    /// The ε applied to every slice: the smaller of the two (each at half the uniform δ, so
    /// taking the smaller after seeing both is valid by the union bound).
    pub deviation: f64,
    pub localized: Localized,
    /// δ of each certificate: split-confirm spends `split_delta / confirmed` per slice.
    pub split_delta: f64,
    pub confirmed: usize,
    pub uniform_delta: f64,
    pub slices: Vec<SliceReport>,
}

/// Scans `t` for slices whose risk exceeds θ and certifies what it finds (module comment).
pub fn analyze(t: &Table, plan: &Plan) -> Report {
    let n = t.losses.len();
    let binary = t.losses.iter().all(|&l| l == 0.0 || l == 1.0);
    let (split_delta, uniform_delta) = (plan.delta / 2.0, plan.delta / 2.0);
    let mut rng = Seeded::new(plan.seed);
    // The seeded split: discover on half A, confirm on half B.
    let mut perm: Vec<u32> = (0..n as u32).collect();
    for i in (1..n).rev() {
        let j = (rng.next_u64() % (i as u64 + 1)) as usize;
        perm.swap(i, j);
    }
    let (half_a, half_b) = perm.split_at(n / 2);
    let scan_a = Scanner::new(t, Some(half_a), plan.depth);
    let excess_a: Vec<f64> = half_a.iter().map(|&r| t.losses[r as usize] - plan.theta).collect();
    let found: Vec<Slice> =
        scan_a.candidates(&excess_a).into_iter().filter(|f| f.sum > 0.0).take(plan.top).map(|f| f.slice).collect();
    let confirmed = found.len();
    let per_slice = split_delta / confirmed.max(1) as f64;

    let scan = Scanner::new(t, None, plan.depth);
    let excess: Vec<f64> = t.losses.iter().map(|&l| l - plan.theta).collect();
    let uniform = uniform(&scan, &excess, plan.theta, plan.sign_draws.max(1), uniform_delta / 2.0, &mut rng);
    let mean = t.losses.iter().sum::<f64>() / n.max(1) as f64;
    let variance_deviation = variance_sensitive(&uniform, n, plan.theta, mean, uniform_delta / 2.0);
    let deviation = uniform.deviation.min(variance_deviation);
    let localized = localized(&scan, &excess, plan.delta, &mut rng);

    // Report what either route found: the split's discoveries and the full window's worst.
    let mut slices: Vec<(Slice, bool)> = found.into_iter().map(|s| (s, true)).collect();
    for f in scan.candidates(&excess).into_iter().filter(|f| f.sum > 0.0).take(plan.top) {
        if !slices.iter().any(|(s, _)| s == &f.slice) {
            slices.push((f.slice, false));
        }
    }
    let mut reports: Vec<SliceReport> = slices
        .into_iter()
        .map(|(slice, split_found)| {
            let members: Vec<usize> = (0..n).filter(|&r| contains(t, &slice, r)).collect();
            let sum: f64 = members.iter().map(|&r| t.losses[r]).sum();
            let n_s = members.len();
            let scan_stat = (sum - plan.theta * n_s as f64) / n as f64;
            let uniform_lower =
                if scan_stat - deviation > 0.0 { (plan.theta + scan_stat - deviation).min(1.0) } else { 0.0 };
            let (mut lower, mut upper, mut by) = (uniform_lower, 1.0, "uniform");
            if split_found {
                let held: Vec<f64> = half_b
                    .iter()
                    .filter(|&&r| contains(t, &slice, r as usize))
                    .map(|&r| t.losses[r as usize])
                    .collect();
                let b = confirm(&held, binary, per_slice);
                if b.lower >= uniform_lower {
                    (lower, upper, by) = (b.lower, b.upper, "split-confirm");
                }
            }
            SliceReport {
                slice,
                n: n_s as u64,
                mean: if n_s == 0 { 0.0 } else { sum / n_s as f64 },
                lower,
                upper,
                certified_by: by,
                violates_sla: lower > plan.theta,
            }
        })
        .collect();
    reports.sort_by(|a, b| b.lower.total_cmp(&a.lower).then(b.mean.total_cmp(&a.mean)));
    reports.truncate(plan.top);
    Report {
        n,
        uniform,
        variance_deviation,
        deviation,
        localized,
        split_delta,
        confirmed,
        uniform_delta,
        slices: reports,
    }
}

/// The uniform bound over a re-tuned decision threshold (METHODS.md §3.4 a): the classifier
/// predicts 1 when score > t, loss l_t = 1[(score > t) ≠ y]. With t chosen on the same window
/// (for example to minimise its error), the fixed-predictor bounds no longer apply; Theorem U1
/// over the class {l_t : t} does: R(t) ≤ R_n(t) + ε for every t at once.
#[derive(Clone, Debug, PartialEq)]
pub struct Recalibrated {
    /// The threshold with the smallest window error (`None`: below every score, all predicted 1).
    pub threshold: Option<f64>,
    pub empirical_risk: f64,
    pub rademacher: f64,
    pub sign_draws: usize,
    pub deviation: f64,
    /// empirical_risk + deviation, capped at 1: valid whichever threshold was picked.
    pub upper: f64,
}

/// Σ s_i l_t(z_i) = Σ s_i (1 − y_i) + Σ_{score_i ≤ t} s_i (2 y_i − 1), so the supremum over t is
/// Σ s_i (1 − y_i) plus the max prefix sum of s_i (2 y_i − 1) in score order, ties grouped.
/// `groups` are the tie groups (row indices) in increasing score order.
fn threshold_sup(groups: &[Vec<u32>], y: &[bool], s: &[f64]) -> f64 {
    let base: f64 = s.iter().zip(y).filter(|(_, &yi)| !yi).map(|(si, _)| si).sum();
    let g: Vec<f64> = groups
        .iter()
        .map(|rows| rows.iter().map(|&i| s[i as usize] * if y[i as usize] { 1.0 } else { -1.0 }).sum())
        .collect();
    base + max_prefix(&g)
}

pub fn recalibrated(scores: &[f64], y: &[bool], k: usize, delta: f64, rng: &mut Seeded) -> Recalibrated {
    let n = scores.len();
    let mut order: Vec<u32> = (0..n as u32).collect();
    order.sort_by(|&a, &b| scores[a as usize].total_cmp(&scores[b as usize]));
    let mut groups: Vec<Vec<u32>> = Vec::new();
    let mut values: Vec<f64> = Vec::new();
    for &i in &order {
        let v = scores[i as usize];
        if values.last() != Some(&v) {
            values.push(v);
            groups.push(Vec::new());
        }
        groups.last_mut().expect("pushed").push(i);
    }
    // Window errors for t below every score (all predicted 1), then t = each unique score.
    let mut errors = y.iter().filter(|&&yi| !yi).count() as i64;
    let (mut best, mut best_t) = (errors, None);
    for (v, rows) in values.iter().zip(&groups) {
        for &i in rows {
            errors += if y[i as usize] { 1 } else { -1 };
        }
        if errors < best {
            best = errors;
            best_t = Some(*v);
        }
    }
    let mut s = vec![0.0; n];
    let mut total = 0.0;
    for _ in 0..k.max(1) {
        for si in s.iter_mut() {
            *si = rng.sign();
        }
        let sign_mean = s.iter().sum::<f64>() / n as f64;
        total += threshold_sup(&groups, y, &s) / n as f64 - 0.5 * sign_mean;
    }
    let rademacher = total / k.max(1) as f64;
    let deviation = 2.0 * rademacher + ((9.0 + 4.0 / k.max(1) as f64) * (1.0 / delta).ln() / (2.0 * n as f64)).sqrt();
    let empirical_risk = best as f64 / n as f64;
    Recalibrated {
        threshold: best_t,
        empirical_risk,
        rademacher,
        sign_draws: k.max(1),
        deviation,
        upper: (empirical_risk + deviation).min(1.0),
    }
}

/// A registered slice's bounds on the whole window (scaled losses).
#[derive(Clone, Debug)]
pub struct Registered {
    pub n: u64,
    pub mean: f64,
    pub bounds: Bounds,
    /// "clopper-pearson" for 0-1 losses, "betting" otherwise.
    pub method: &'static str,
}

/// Slices fixed before the data need no protection from selection: a fixed-predictor bound
/// on the whole window at δ/M each (Bonferroni over the M of them).
pub fn registered(t: &Table, fixed: &[Slice], delta: f64) -> Vec<Registered> {
    let binary = t.losses.iter().all(|&l| l == 0.0 || l == 1.0);
    let per = delta / fixed.len().max(1) as f64;
    fixed
        .iter()
        .map(|s| {
            let held: Vec<f64> = (0..t.losses.len()).filter(|&r| contains(t, s, r)).map(|r| t.losses[r]).collect();
            Registered {
                n: held.len() as u64,
                mean: if held.is_empty() { 0.0 } else { held.iter().sum::<f64>() / held.len() as f64 },
                bounds: confirm(&held, binary, per),
                method: if binary { "clopper-pearson" } else { "betting" },
            }
        })
        .collect()
}

/// Parses a registered slice: `F=V`, `F=V&G=W` (a conjunction), `F<=T`, `F>T`, or `A<F<=B`.
/// `categorical` and `numeric` are the feature names it may use.
pub fn parse_slice(text: &str, categorical: &[String], numeric: &[String]) -> Result<Slice, String> {
    let num = |s: &str| s.trim().parse::<f64>().map_err(|_| format!("{s:?} is not a number"));
    let numeric_feature = |f: &str| -> Result<String, String> {
        let f = f.trim();
        numeric.iter().find(|n| n.as_str() == f).cloned().ok_or_else(|| format!("{f:?} is not a --numeric feature"))
    };
    if let Some((left, right)) = text.split_once("<=") {
        if let Some((low, feature)) = left.split_once('<') {
            return Ok(Slice::Interval { feature: numeric_feature(feature)?, low: num(low)?, high: num(right)? });
        }
        return Ok(Slice::Threshold { feature: numeric_feature(left)?, low: None, high: Some(num(right)?) });
    }
    if let Some((feature, t)) = text.split_once('>') {
        return Ok(Slice::Threshold { feature: numeric_feature(feature)?, low: Some(num(t)?), high: None });
    }
    let mut parts = Vec::new();
    for p in text.split('&') {
        let (f, v) = p.split_once('=').ok_or_else(|| format!("{p:?}: write F=V, F<=T, F>T or A<F<=B"))?;
        let f = f.trim();
        if !categorical.iter().any(|c| c == f) {
            return Err(format!("{f:?} is not a --categorical feature"));
        }
        parts.push((f.to_string(), v.trim().to_string()));
    }
    Ok(match parts.len() {
        1 => {
            let (feature, value) = parts.pop().expect("one part");
            Slice::Category { feature, value }
        }
        _ => Slice::Conjunction { parts },
    })
}
