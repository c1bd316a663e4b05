//! The scan: the rows of a window indexed per feature (dense codes for categories, one sort
//! for numbers, ties grouped), and the exact supremum over the slice class of Σ_{i∈S} w_i for
//! any weight vector w: max group sum, max prefix or suffix sum, max subarray (Kadane).

use super::*;

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
pub(super) struct CatIndex {
    /// (feature, value) parts of each code's slice.
    pub(super) labels: Vec<Vec<(String, String)>>,
    pub(super) codes: Vec<u32>,
}

/// A numeric feature: rows in sorted order, and where each run of tied values ends.
pub(super) struct NumIndex {
    pub(super) name: String,
    pub(super) order: Vec<u32>,
    /// ends[g] = one past the last position (in `order`) of unique value g.
    pub(super) ends: Vec<u32>,
    pub(super) values: Vec<f64>,
}

/// The sorted and grouped view of a set of rows, reused for every weight vector.
pub struct Scanner {
    pub(super) n: usize,
    pub(super) cats: Vec<CatIndex>,
    pub(super) nums: Vec<NumIndex>,
}

/// The best slice of one family for a weight vector, and its sum.
#[derive(Clone, Debug)]
pub struct Found {
    pub slice: Slice,
    pub sum: f64,
}

pub(super) fn combos(m: usize, depth: usize) -> Vec<Vec<usize>> {
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
pub(super) fn total_order_key(v: f64) -> u64 {
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
pub(super) fn dense_codes<K: Copy>(
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
pub(super) fn code_strings<'a>(values: impl Iterator<Item = &'a str>) -> Option<(Vec<u32>, Vec<String>)> {
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
pub(super) fn same_str(a: &str, b: &str) -> bool {
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
pub(super) fn code_strings_sip<'a>(values: impl Iterator<Item = &'a str>) -> (Vec<u32>, Vec<String>) {
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
pub(super) fn from_total_order_key(k: u64) -> f64 {
    f64::from_bits(if k >> 63 == 1 { k & !(1 << 63) } else { !k })
}

/// Sorts (key, payload) pairs by key, stably: least-significant-byte radix sort, one
/// histogram pass for all eight bytes, and no pass for a byte every key shares (a feature's
/// values in [0, 1] share their top bytes). O(n) per byte, where a comparison sort is
/// O(n log n) with a branch per comparison that ties and random data both mispredict.
pub(super) fn radix_sorted(mut a: Vec<(u64, u32)>) -> Vec<(u64, u32)> {
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
pub(super) type NumGroups = (Vec<u32>, Vec<u32>, Vec<f64>);

/// [`NumGroups`] from (key, position) pairs sorted by key.
pub(super) fn groups_of_sorted(sorted: &[(u64, u32)]) -> NumGroups {
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
pub(super) fn few_distinct_groups(keys: &[u64]) -> Option<NumGroups> {
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
