//! The one seeded generator of the project's own code: the slice certificates' signs and splits
//! and the demo's invented data come from it, so each is reproducible from its seed. (Tests and
//! benchmarks draw their streams from `rand`'s Xoshiro256PlusPlus, a generator from outside.)

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
    /// Uniform on [0, 1), from the top 53 bits.
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
    /// An integer in [0, n) (modulo: the bias, below n / 2^64, does not matter here).
    pub fn below(&mut self, n: u64) -> u64 {
        self.next_u64() % n
    }
    pub fn sign(&mut self) -> f64 {
        if self.next_u64() >> 63 == 0 {
            -1.0
        } else {
            1.0
        }
    }
}
