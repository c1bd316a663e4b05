use super::*;

/// Exact E over all 2^n sign vectors of f(signs), for n ≤ 20.
fn exact_mean(n: usize, f: impl Fn(&[f64]) -> f64) -> f64 {
    let mut s = vec![0.0; n];
    let mut total = 0.0;
    for mask in 0u32..(1 << n) {
        for (i, x) in s.iter_mut().enumerate() {
            *x = if mask >> i & 1 == 1 { 1.0 } else { -1.0 };
        }
        total += f(&s);
    }
    total / f64::from(1u32 << n)
}

#[test]
fn threshold_rademacher_average_is_the_random_walk_maximum() {
    // On distinct points sup_t Σ_{x_i ≤ t} s_i is the maximum M_n of a simple random walk; its
    // mean by the reflection principle (Feller, Vol. I, Ch. III), from docs/methods.md §3.5:
    // E M_10 = 2.083984375, E M_16 = 2.7402801513671875.
    assert_eq!(exact_mean(10, max_prefix), 2.083984375);
    assert_eq!(exact_mean(16, max_prefix), 2.7402801513671875);
    // Upper thresholds are the same walk read backwards.
    assert_eq!(exact_mean(16, max_suffix), 2.7402801513671875);
}

#[test]
fn interval_rademacher_average_is_the_maximum_subarray_mean() {
    // E[max subarray of 16 signs] = 4.103546142578125 (exhaustive enumeration, docs/methods.md §3.5).
    assert_eq!(exact_mean(16, max_subarray), 4.103546142578125);
}

#[test]
fn threshold_average_at_n_1000_by_monte_carlo() {
    // E M_1000 = 24.7376306875 (reflection principle, docs/methods.md §3.5); 20000 seeded walks,
    // within 4 standard errors (sd of M_n is about sqrt((1 − 2/π) n) ≈ 19).
    let mut rng = Seeded::new(11);
    let k = 20_000;
    let mut g = vec![0.0; 1000];
    let (mut sum, mut sq) = (0.0, 0.0);
    for _ in 0..k {
        for x in g.iter_mut() {
            *x = rng.sign();
        }
        let m = max_prefix(&g);
        sum += m;
        sq += m * m;
    }
    let mean = sum / k as f64;
    let se = ((sq / k as f64 - mean * mean) / k as f64).sqrt();
    assert!((mean - 24.7376306875).abs() < 4.0 * se, "{mean} ± {se}");
}

fn table(seed: u64, n: usize) -> Table {
    let mut r = Seeded::new(seed);
    let mut u = || (r.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
    let losses: Vec<f64> = (0..n).map(|_| if u() < 0.3 { 1.0 } else { u() * 0.2 }).collect();
    let a: Vec<String> = (0..n).map(|_| ["x", "y", "z"][(u() * 3.0) as usize].to_string()).collect();
    let b: Vec<String> = (0..n).map(|_| ["p", "q"][(u() * 2.0) as usize].to_string()).collect();
    // Heavy ties: five distinct values.
    let v: Vec<f64> = (0..n).map(|_| (u() * 5.0).floor() / 4.0).collect();
    Table { losses, categorical: vec![("a".into(), a), ("b".into(), b)], numeric: vec![("v".into(), v)] }
}

/// Every slice of the class, enumerated the slow way.
fn brute_force_sup(t: &Table, w: &[f64], depth: usize) -> f64 {
    let n = t.losses.len();
    let mut best = 0.0_f64;
    let sum_if = |f: &dyn Fn(usize) -> bool| (0..n).filter(|&i| f(i)).map(|i| w[i]).sum::<f64>();
    let mut vals: Vec<f64> = t.numeric[0].1.clone();
    vals.sort_by(f64::total_cmp);
    vals.dedup();
    let x = &t.numeric[0].1;
    for &lo in &vals {
        best = best.max(sum_if(&|i| x[i] <= lo)).max(sum_if(&|i| x[i] > lo));
        for &hi in &vals {
            best = best.max(sum_if(&|i| x[i] > lo && x[i] <= hi));
        }
    }
    let (a, b) = (&t.categorical[0].1, &t.categorical[1].1);
    for va in ["x", "y", "z"] {
        best = best.max(sum_if(&|i| a[i] == va));
        for vb in ["p", "q"] {
            best = best.max(sum_if(&|i| b[i] == vb));
            if depth >= 2 {
                best = best.max(sum_if(&|i| a[i] == va && b[i] == vb));
            }
        }
    }
    best
}

#[test]
fn every_supremum_agrees_with_brute_force_on_tied_data() {
    for seed in 0..200 {
        let t = table(seed, 5 + (seed as usize % 40));
        let depth = 1 + (seed as usize % 2);
        let scan = Scanner::new(&t, None, depth);
        let mut rng = Seeded::new(seed + 1000);
        let w: Vec<f64> = t.losses.iter().map(|l| rng.sign() * (l - 0.15)).collect();
        let fast = scan.sup(&w, &mut Vec::new());
        let slow = brute_force_sup(&t, &w, depth);
        assert!((fast - slow).abs() < 1e-12, "seed {seed}: {fast} vs {slow}");
        // The best candidate is a member of the class with the right sum.
        let top = &scan.candidates(&w)[0];
        let direct: f64 = (0..t.losses.len()).filter(|&i| contains(&t, &top.slice, i)).map(|i| w[i]).sum();
        assert!((top.sum - direct).abs() < 1e-12, "seed {seed}: {:?}", top.slice);
        // The best candidate attains the supremum, unless that is the whole window (in the
        // class, but not reported as a slice).
        let whole: f64 = w.iter().sum();
        assert!(top.sum <= fast + 1e-12, "seed {seed}");
        assert!(
            fast <= 0.0 || top.sum >= fast - 1e-12 || (whole - fast).abs() < 1e-12,
            "seed {seed}: {} vs {fast}",
            top.sum
        );
    }
}

#[test]
fn massarts_bound_holds_for_a_finite_class() {
    // Massart's lemma (Massart 2000, Lemma 5.2): E_s max_j (1/n) Σ s_i (g_j(z_i) − c0) ≤
    // max_j ‖g_j − c0‖₂ sqrt(2 ln M) / n. The class: the 3 + 2 categories of a 14-row table,
    // exact expectation over all 2^14 sign vectors.
    let t = table(5, 14);
    let theta = 0.15;
    let c0 = 0.5 - theta;
    let n = t.losses.len();
    let g: Vec<Vec<f64>> = ["x", "y", "z"]
        .iter()
        .map(|v| (0..n).map(|i| if t.categorical[0].1[i] == *v { t.losses[i] - theta } else { 0.0 }).collect())
        .chain(
            ["p", "q"]
                .iter()
                .map(|v| (0..n).map(|i| if t.categorical[1].1[i] == *v { t.losses[i] - theta } else { 0.0 }).collect()),
        )
        .collect();
    let exact = exact_mean(n, |s| {
        g.iter().map(|gj| gj.iter().zip(s).map(|(x, si)| si * (x - c0)).sum::<f64>()).fold(f64::NEG_INFINITY, f64::max)
            / n as f64
    });
    let norm = g.iter().map(|gj| gj.iter().map(|x| (x - c0) * (x - c0)).sum::<f64>().sqrt()).fold(0.0, f64::max);
    let massart = norm * (2.0 * (g.len() as f64).ln()).sqrt() / n as f64;
    assert!(exact <= massart, "{exact} > {massart}");
    assert!(exact > 0.0);
}

#[test]
fn uniform_equals_the_plain_computation_with_the_same_signs() {
    // The bitset path of `uniform` against w = s·e and `Scanner::sup`, draw by draw.
    let t = table(3, 777);
    let theta = 0.15;
    let scan = Scanner::new(&t, None, 2);
    let excess: Vec<f64> = t.losses.iter().map(|l| l - theta).collect();
    let got = uniform(&scan, &excess, theta, 7, 0.05, &mut Seeded::new(9));
    let mut rng = Seeded::new(9);
    let n = excess.len();
    let mut total = 0.0;
    for _ in 0..7 {
        let words: Vec<u64> = (0..n.div_ceil(64)).map(|_| rng.next_u64()).collect();
        let s: Vec<f64> = (0..n).map(|i| if words[i / 64] >> (i % 64) & 1 == 1 { 1.0 } else { -1.0 }).collect();
        let w: Vec<f64> = s.iter().zip(&excess).map(|(a, b)| a * b).collect();
        total += scan.sup(&w, &mut Vec::new()) / n as f64 - (0.5 - theta) * s.iter().sum::<f64>() / n as f64;
    }
    assert!((got.rademacher - total / 7.0).abs() < 1e-12, "{} vs {}", got.rademacher, total / 7.0);
}

#[test]
fn threshold_class_supremum_agrees_with_brute_force() {
    for seed in 0..100u64 {
        let mut r = Seeded::new(seed);
        let n = 3 + (seed as usize % 30);
        let scores: Vec<f64> = (0..n).map(|_| (r.next_u64() % 6) as f64 / 5.0).collect();
        let y: Vec<bool> = (0..n).map(|_| r.next_u64().is_multiple_of(3)).collect();
        let s: Vec<f64> = (0..n).map(|_| r.sign()).collect();
        let rec = recalibrated(&scores, &y, 1, 0.05, &mut Seeded::new(1));
        let mut vals = scores.clone();
        vals.sort_by(f64::total_cmp);
        vals.dedup();
        let mut ts: Vec<Option<f64>> = vec![None];
        ts.extend(vals.iter().map(|&v| Some(v)));
        let loss = |t: Option<f64>, i: usize| -> f64 {
            let predicted = t.is_none_or(|t| scores[i] > t);
            f64::from(u8::from(predicted != y[i]))
        };
        let brute =
            ts.iter().map(|&t| (0..n).map(|i| s[i] * loss(t, i)).sum::<f64>()).fold(f64::NEG_INFINITY, f64::max);
        let mut order: Vec<u32> = (0..n as u32).collect();
        order.sort_by(|&a, &b| scores[a as usize].total_cmp(&scores[b as usize]));
        let mut groups: Vec<Vec<u32>> = Vec::new();
        let mut last = None;
        for &i in &order {
            if last != Some(scores[i as usize]) {
                groups.push(Vec::new());
                last = Some(scores[i as usize]);
            }
            groups.last_mut().unwrap().push(i);
        }
        assert!((threshold_sup(&groups, &y, &s) - brute).abs() < 1e-12, "seed {seed}");
        // The reported threshold minimises the window error.
        let min_err = ts.iter().map(|&t| (0..n).map(|i| loss(t, i)).sum::<f64>()).fold(f64::INFINITY, f64::min);
        let at = (0..n).map(|i| loss(rec.threshold, i)).sum::<f64>();
        assert_eq!(at, min_err, "seed {seed}");
        assert!((rec.empirical_risk - min_err / n as f64).abs() < 1e-12);
    }
}

#[test]
fn the_bit_sliced_path_equals_the_plain_computation_for_zero_one_losses() {
    // 0-1 losses take the 64-draws-at-a-time path; 70 draws make one full and one partial block.
    let mut t = table(4, 500);
    for l in t.losses.iter_mut() {
        *l = f64::from(*l >= 0.5);
    }
    let theta = 0.15;
    let scan = Scanner::new(&t, None, 2);
    let excess: Vec<f64> = t.losses.iter().map(|l| l - theta).collect();
    let k = 70;
    let got = uniform(&scan, &excess, theta, k, 0.05, &mut Seeded::new(5));
    let mut rng = Seeded::new(5);
    let n = excess.len();
    let mut total = 0.0;
    let mut done = 0;
    while done < k {
        let words: Vec<u64> = (0..n).map(|_| rng.next_u64()).collect();
        for j in 0..(k - done).min(64) {
            let s: Vec<f64> = words.iter().map(|w| if w >> j & 1 == 1 { 1.0 } else { -1.0 }).collect();
            let w: Vec<f64> = s.iter().zip(&excess).map(|(a, b)| a * b).collect();
            total += scan.sup(&w, &mut Vec::new()) / n as f64 - (0.5 - theta) * s.iter().sum::<f64>() / n as f64;
        }
        done += 64;
    }
    assert!((got.rademacher - total / k as f64).abs() < 1e-12, "{} vs {}", got.rademacher, total / k as f64);
}

#[test]
fn the_radix_sort_orders_as_total_cmp_and_keeps_ties_in_place() {
    let mut r = Seeded::new(3);
    let mut v: Vec<f64> = (0..5000).map(|_| ((r.next_u64() % 2001) as f64 - 1000.0) / 7.0).collect();
    v.extend([0.0, -0.0, f64::INFINITY, f64::NEG_INFINITY, f64::MIN_POSITIVE, -f64::MIN_POSITIVE, 1e300, -1e300]);
    let got = super::radix_sorted(v.iter().enumerate().map(|(i, &x)| (super::total_order_key(x), i as u32)).collect());
    let mut want: Vec<(f64, u32)> = v.iter().enumerate().map(|(i, &x)| (x, i as u32)).collect();
    want.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1))); // stable: ties by position
    let got: Vec<(f64, u32)> = got.into_iter().map(|(_, i)| (v[i as usize], i)).collect();
    assert_eq!(got.len(), want.len());
    for (g, w) in got.iter().zip(&want) {
        assert_eq!((g.0.to_bits(), g.1), (w.0.to_bits(), w.1));
    }
}

#[test]
fn both_counting_kernels_give_the_same_counts() {
    // The AVX-512 kernel (where the CPU has it) against the portable one, including groups past
    // 65,535 rows where the 16-bit lanes are emptied.
    let mut r = Seeded::new(11);
    let words: Vec<u64> = (0..200_000).map(|_| r.next_u64()).collect();
    let fast = super::count_bits_kernel();
    for len in [0usize, 1, 7, 64, 1000, 65_535, 65_536, 140_000] {
        let rows: Vec<u32> = (0..len).map(|_| (r.next_u64() % words.len() as u64) as u32).collect();
        let (mut a, mut b) = ([0u32; 64], [0u32; 64]);
        super::count_bits_portable(&words, &rows, &mut a);
        fast(&words, &rows, &mut b);
        assert_eq!(a, b, "{len} rows");
        // And against the definition.
        for j in [0usize, 31, 32, 63] {
            assert_eq!(a[j] as usize, rows.iter().filter(|&&i| words[i as usize] >> j & 1 == 1).count());
        }
    }
}

#[test]
fn the_tied_value_sort_equals_the_radix_sort_or_declines() {
    let mut r = Seeded::new(8);
    // Few distinct values: taken by the hash path, same result as the radix sort.
    let keys: Vec<u64> = (0..20_000).map(|_| super::total_order_key((r.next_u64() % 300) as f64 / 10.0)).collect();
    let pairs: Vec<(u64, u32)> = keys.iter().zip(0u32..).map(|(&k, p)| (k, p)).collect();
    assert_eq!(super::few_distinct_groups(&keys), Some(super::groups_of_sorted(&super::radix_sorted(pairs))));
    // −0 and +0 are one value on both paths.
    let keys: Vec<u64> = (0..800).map(|i| super::total_order_key([0.0, -0.0, 1.5, -2.0][i % 4])).collect();
    let pairs: Vec<(u64, u32)> = keys.iter().zip(0u32..).map(|(&k, p)| (k, p)).collect();
    let few = super::few_distinct_groups(&keys).unwrap();
    assert_eq!(few, super::groups_of_sorted(&super::radix_sorted(pairs)));
    assert_eq!(few.2, vec![-2.0, 0.0, 1.5]);
    // Mostly distinct values: declined.
    let keys: Vec<u64> = (0..20_000).map(|_| r.next_u64()).collect();
    assert_eq!(super::few_distinct_groups(&keys), None);
    // Keys built to collide under the multiply-shift hash: 200 distinct keys (few enough for
    // the hash path) that all land in slot 0, declined after a bounded probe.
    let n = 16_000usize;
    let bits = 10; // the table's starting size, 2^10: 200 keys never make it grow
    let a: u64 = 0x9E37_79B9_7F4A_7C15;
    let mut inv = a; // the multiplier's inverse mod 2^64, by Newton's iteration
    for _ in 0..6 {
        inv = inv.wrapping_mul(2u64.wrapping_sub(a.wrapping_mul(inv)));
    }
    assert_eq!(a.wrapping_mul(inv), 1);
    let distinct: Vec<u64> = (1..=200u64).map(|j| j.wrapping_mul(inv)).collect();
    assert!(distinct.iter().all(|&k| k.wrapping_mul(a) >> (64 - bits) == 0));
    let keys: Vec<u64> = (0..n).map(|i| distinct[i % 200]).collect();
    assert_eq!(super::few_distinct_groups(&keys), None);
}

#[test]
fn both_string_codings_agree() {
    let mut r = Seeded::new(4);
    for distinct in [1u64, 3, 40, 700, 5000] {
        let values: Vec<String> = (0..20_000)
            .map(|_| format!("value-{}-{}", r.next_u64() % distinct, "x".repeat((r.next_u64() % 20) as usize)))
            .collect();
        let fast = super::code_strings(values.iter().map(String::as_str)).expect("no long probes on these");
        let sip = super::code_strings_sip(values.iter().map(String::as_str));
        assert_eq!(fast, sip, "{distinct} distinct");
    }
    assert_eq!(super::code_strings(std::iter::empty()), Some((Vec::new(), Vec::new())));
}

#[test]
fn the_avx512_build_of_the_binary_path_equals_the_portable_one_to_the_bit() {
    if !super::has_avx512() {
        eprintln!("this CPU has no AVX-512: only the portable path runs here");
        return;
    }
    let mut t = table(4, 3000);
    for l in t.losses.iter_mut() {
        *l = f64::from(*l >= 0.5);
    }
    let theta = 0.15;
    let scan = Scanner::new(&t, None, 2);
    let excess: Vec<f64> = t.losses.iter().map(|l| l - theta).collect();
    let high = 1.0 - theta;
    let job = super::Binary { scan: &scan, excess: &excess, high, theta, k: 130, delta: 0.05 };
    let portable = super::uniform_binary_with(&job, &mut Seeded::new(2), super::count_bits_portable);
    // SAFETY: AVX-512 checked above.
    let fast = unsafe { super::uniform_binary_avx512(&job, &mut Seeded::new(2)) };
    assert_eq!(portable.rademacher.to_bits(), fast.rademacher.to_bits());
    assert_eq!(portable.deviation.to_bits(), fast.deviation.to_bits());
}

#[test]
fn short_string_equality_is_equality() {
    let words =
        ["", "a", "ab", "abcdefgh", "abcdefghijklmnop", "abcdefghijklmnoq", "abcdefghijklmnopq", "é", "e\u{301}"];
    for a in words {
        for b in words {
            assert_eq!(super::same_str(a, b), a == b, "{a:?} {b:?}");
        }
    }
}

#[test]
fn the_variance_sensitive_deviation_is_the_stated_formula() {
    // docs/methods.md §3.3 evaluated independently on a fine grid of α, with the δ split written
    // out: x = ln(4/δ) (2e^{−x} = δ/2), R = R̃ + sqrt(ln(4/δ)/(2nk)), μ⁺ the kl upper bound at δ/4.
    let (n, k, theta, mean, delta) = (20_000usize, 50usize, 0.15, 0.09, 0.025);
    let u = Uniform { rademacher: 0.004, sign_draws: k, deviation: 0.0 };
    let got = super::variance_sensitive(&u, n, theta, mean, delta);
    let nf = n as f64;
    let x = (4.0 / delta).ln();
    let r = 0.004 + ((4.0 / delta).ln() / (2.0 * nf * k as f64)).sqrt();
    let mu = crate::estimate::kl::bounds(n as u64, mean, delta / 4.0).upper;
    assert!(mu > mean && mu < mean + 0.01);
    let s2 = theta * theta + (1.0 - 2.0 * theta) * mu;
    let fine = (1..10_000)
        .map(|i| {
            let a = i as f64 / 10_000.0;
            2.0 * (1.0 + a) / (1.0 - a) * r
                + (2.0 * s2 * x / nf).sqrt()
                + (1.0 / 3.0 + 1.0 / a + (1.0 + a) / (2.0 * a * (1.0 - a))) * x / nf
        })
        .fold(f64::INFINITY, f64::min);
    assert!(got >= fine - 1e-15 && got <= fine * 1.01, "{got} vs {fine}");
    // With a small variance and many rows it beats Theorem U1 at the same δ.
    let u1 = 2.0 * 0.004 + ((9.0 + 4.0 / k as f64) * (1.0 / delta).ln() / (2.0 * nf)).sqrt();
    assert!(got < u1, "{got} vs {u1}");
}

/// Regression: with depth 2, `region=ne & carrier=x` selects exactly the rows of `carrier=x`
/// (x only delivers in ne). It took a second top-K slot and counted in split-confirm's K.
#[test]
fn each_row_set_is_reported_once() {
    let mut rng = Seeded::new(11);
    let n = 4000;
    let (mut losses, mut region, mut carrier) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..n {
        let ne = i % 4 == 0;
        let x = ne && i % 8 == 0;
        region.push(if ne { "ne" } else { "sw" }.to_string());
        carrier.push(if x { "x".to_string() } else { ["y", "z"][i % 2].to_string() });
        losses.push(if rng.uniform() < if x { 0.6 } else { 0.05 } { 1.0 } else { 0.0 });
    }
    let t =
        Table { losses, categorical: vec![("region".into(), region), ("carrier".into(), carrier)], numeric: vec![] };
    let plan = Plan { theta: 0.1, delta: 0.05, top: 5, seed: 3, sign_draws: 20, depth: 2 };
    let r = analyze(&t, &plan);
    let rows = |s: &Slice| -> Vec<usize> { (0..n).filter(|&i| contains(&t, s, i)).collect() };
    let sets: Vec<Vec<usize>> = r.slices.iter().map(|s| rows(&s.slice)).collect();
    for i in 0..sets.len() {
        for j in 0..i {
            assert_ne!(
                sets[i],
                sets[j],
                "{} and {} select the same rows",
                r.slices[i].slice.describe(),
                r.slices[j].slice.describe()
            );
        }
    }
    // The shorter description names the set.
    assert!(
        r.slices.iter().any(|s| s.slice.describe() == "carrier=x"),
        "{:?}",
        r.slices.iter().map(|s| s.slice.describe()).collect::<Vec<_>>()
    );
    assert!(!r.slices.iter().any(|s| s.slice.describe().contains("carrier=x") && s.slice.describe().contains('&')));
}
