//! Exact integer noise samplers (discrete Laplace, discrete Gaussian) and the keyed derivation
//! of the random stream behind every noise draw.
//!
//! # Why exact samplers
//! Floating-point Laplace and Gaussian samplers leak the noiseless value through the low-order
//! bits of their output (Mironov, ACM CCS 2012; privacy-math §3). Every sampler here follows
//! Canonne, Kamath & Steinke, "The Discrete Gaussian for Differential Privacy", NeurIPS 2020
//! (CKS20), Algorithms 1–3 as transcribed in privacy-math §3: only integer and rational
//! arithmetic on uniformly random integers, no floating point anywhere on the sampling path.
//!
//! Arithmetic runs on `u128` with checked operations. Whenever an intermediate would overflow,
//! that one step is redone on [`BigUint`] with the *same* random values already drawn, so the
//! choice of representation depends only on values the step has already fixed and both
//! representations compute the same rational; the output distribution is therefore exactly the
//! one of the pure rational algorithm for every input. Callers pass σ² up to about 2^60 (integer)
//! routinely; that range stays on the `u128` path (see `fast_path_covers_sigma2_2_pow_60`).
//!
//! # Timing side channel
//! The run time of these rejection samplers depends on the value drawn (larger noise takes more
//! loop iterations), which an observer who can time the sampler can exploit (Jin, McMurtry,
//! Rubinstein & Ohrimenko, "Are We There Yet? Timing and Floating-Point Attacks on Differential
//! Privacy Systems", arXiv:2112.05307). scrim does not pad the samplers to constant time.
//! Instead it draws noise only when a window closes, inside the single engine task, never on a
//! request path, so no client can time an individual draw. Code that calls these samplers on
//! a request path would reopen the channel.
//!
//! # Keyed noise
//! Every draw comes from a ChaCha20 stream seeded by a keyed BLAKE3 hash of the draw's identity
//! ([`NoiseKey::rng_for`]), so the same tree node always gets the same noise (replay after a
//! restart cannot average fresh noise away) and no state besides the key needs saving.

use std::fmt;

use num_bigint::{BigInt, BigUint, Sign};
use num_traits::{ToPrimitive, Zero};
use rand::Rng;
use rand::SeedableRng;
use rand::rngs::ChaCha20Rng;

/// BLAKE3 `derive_key` context for [`NoiseKey::from_seed`]; globally unique and fixed forever
/// (changing it changes every replayed test stream).
const SEED_CONTEXT: &str = "scrim 2026-12-01 NoiseKey::from_seed test and replay key v1";

/// BLAKE3 `derive_key` context for the [`NoiseKey::hash64`] subkeys.
const HASH64_CONTEXT: &str = "scrim 2026-12-01 NoiseKey::hash64 subkey v1";

/// Version tag that opens every encoded [`NoiseId`]; a new encoding gets a new tag.
const STREAM_TAG: &[u8; 16] = b"scrim.noise.v1\0\0";

/// BLAKE3 `derive_key` context for the [`EventHash::SipHash24`] keys.
const SIPHASH_CONTEXT: &str = "scrim 2026-12-02 NoiseKey::event_hasher SipHash-2-4 key v1";

/// The 32-byte secret from which every noise draw is derived, and the keyed hash its state
/// uses for events ([`EventHash`]).
///
/// Whoever holds the key can recompute all noise and subtract it, so it must stay as secret as
/// the raw data. `Debug` prints a placeholder, never the bytes.
#[derive(Clone)]
pub struct NoiseKey {
    bytes: [u8; 32],
    event_hash: EventHash,
}

/// The keyed 64-bit hash applied to every event: to its unit id (the privacy unit's
/// pseudonym, the key of the bounding tables) and, for units over the per-window bound, to
/// its content (the bottom-k priority). Both must stay the same for the life of a state:
/// replaying its log under another hash would re-decide which events count, and pair
/// noise already published with different data. So the choice is recorded in the state
/// (`meta.json`) and travels with the key.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum EventHash {
    /// Keyed BLAKE3 (first 8 output bytes), of states created before state format 3.
    Blake3,
    /// SipHash-2-4 (Aumasson & Bernstein 2012, "SipHash: a fast short-input PRF"), keyed
    /// with 128 bits derived from the noise key. A PRF built for short inputs such as ids:
    /// in the issue 9 profile of a replay, keyed BLAKE3 of the unit ids took 10% of the
    /// time and SipHash-2-4 takes 1%. The default for new states and runs without state.
    #[default]
    SipHash24,
}

impl EventHash {
    /// The name recorded in a state's `meta.json`.
    pub fn name(self) -> &'static str {
        match self {
            EventHash::Blake3 => "blake3-v1",
            EventHash::SipHash24 => "siphash24-v1",
        }
    }

    /// The hash of a recorded name.
    pub fn from_name(name: &str) -> Option<EventHash> {
        [EventHash::Blake3, EventHash::SipHash24]
            .into_iter()
            .find(|h| h.name() == name)
    }
}

impl fmt::Debug for NoiseKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("NoiseKey(<redacted>)")
    }
}

/// The identity of one noise draw: which statistic, which part of it, which tree node and
/// which coordinate. Two draws with equal ids get identical noise; any field differing gives an
/// unrelated stream.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct NoiseId<'a> {
    /// Name of the configured statistic.
    pub stat: &'a str,
    /// Which aggregate of the statistic (e.g. count vs sum, XᵀX vs Xᵀy).
    pub component: u8,
    /// Group (partition key) index.
    pub group: u32,
    /// Budget epoch the draw belongs to.
    pub epoch: u64,
    /// Tree level of the node (0 = leaves).
    pub level: u8,
    /// Node index within its level.
    pub index: u64,
    /// Coordinate within a vector-valued node.
    pub coord: u32,
}

impl NoiseId<'_> {
    /// Unambiguous byte encoding: fixed tag, then the only variable-length field (`stat`)
    /// prefixed by its length, then the fixed-width fields in little endian. Two ids encode to
    /// the same bytes only if every field is equal.
    fn encode(&self) -> Vec<u8> {
        let mut bytes = Vec::with_capacity(STREAM_TAG.len() + 8 + self.stat.len() + 26);
        bytes.extend_from_slice(STREAM_TAG);
        bytes.extend_from_slice(&(self.stat.len() as u64).to_le_bytes());
        bytes.extend_from_slice(self.stat.as_bytes());
        bytes.push(self.component);
        bytes.extend_from_slice(&self.group.to_le_bytes());
        bytes.extend_from_slice(&self.epoch.to_le_bytes());
        bytes.push(self.level);
        bytes.extend_from_slice(&self.index.to_le_bytes());
        bytes.extend_from_slice(&self.coord.to_le_bytes());
        bytes
    }
}

impl NoiseKey {
    /// Wraps 32 secret bytes (from OS entropy at first start, or from the state file).
    pub fn from_bytes(bytes: [u8; 32]) -> NoiseKey {
        NoiseKey {
            bytes,
            event_hash: EventHash::default(),
        }
    }

    /// The same key with event hash `event_hash` (the one its state records).
    pub fn with_event_hash(self, event_hash: EventHash) -> NoiseKey {
        NoiseKey { event_hash, ..self }
    }

    /// The keyed hash this key applies to events.
    pub fn event_hash(&self) -> EventHash {
        self.event_hash
    }

    /// The secret bytes, for writing the state file only.
    pub fn as_bytes(&self) -> &[u8; 32] {
        &self.bytes
    }

    /// A test/replay key from a `u64` seed: BLAKE3 `derive_key` with a fixed domain-separation
    /// context over the seed's little-endian bytes. Not secret: never use it in production.
    pub fn from_seed(seed: u64) -> NoiseKey {
        NoiseKey::from_bytes(blake3::derive_key(SEED_CONTEXT, &seed.to_le_bytes()))
    }

    /// The deterministic ChaCha20 stream for one noise identity: the BLAKE3 keyed hash
    /// (key = this key) of the id's unambiguous encoding is the 32-byte ChaCha20 seed.
    ///
    /// BLAKE3 keyed mode is a PRF, so streams for different ids are computationally
    /// independent, and ChaCha20 is a CSPRNG, so a stream reveals nothing about the key.
    pub fn rng_for(&self, id: &NoiseId<'_>) -> ChaCha20Rng {
        let seed = blake3::keyed_hash(&self.bytes, &id.encode());
        ChaCha20Rng::from_seed(*seed.as_bytes())
    }

    /// Keyed 64-bit hash for other uses (e.g. privacy-unit ids): BLAKE3 keyed with the subkey
    /// `derive_key(HASH64_CONTEXT, key ‖ domain)`, first 8 output bytes as little endian.
    ///
    /// `derive_key` mode carries different BLAKE3 domain flags from keyed mode, so the
    /// subkeys are unrelated to the noise streams of [`NoiseKey::rng_for`]; the key is fixed
    /// width, so `key ‖ domain` is unambiguous and each domain gets its own subkey.
    pub fn hash64(&self, domain: &str, data: &[u8]) -> u64 {
        self.hasher64(domain).hash(data)
    }

    /// The keyed hash of [`NoiseKey::hash64`] for one `domain`, with its subkey derived once,
    /// for callers that hash many values in one domain (deriving the subkey per call doubles
    /// the BLAKE3 work). Same outputs as `hash64`. It is the event hash of states before
    /// format 3 ([`EventHash::Blake3`]); events go through [`NoiseKey::event_hasher`].
    pub fn hasher64(&self, domain: &str) -> KeyedHash64 {
        let mut derive = blake3::Hasher::new_derive_key(HASH64_CONTEXT);
        derive.update(&self.bytes);
        derive.update(domain.as_bytes());
        KeyedHash64(Keyed::Blake3(*derive.finalize().as_bytes()))
    }

    /// The keyed hash of events in `domain` ("unit", "priority"): [`NoiseKey::hasher64`]
    /// for [`EventHash::Blake3`]; for [`EventHash::SipHash24`], SipHash-2-4 keyed with the
    /// first 16 bytes of BLAKE3 `derive_key(SIPHASH_CONTEXT, key ‖ domain)` (k0, k1 little
    /// endian). As with `hasher64`, the key's fixed width makes `key ‖ domain` unambiguous,
    /// so each domain gets its own key, unrelated to the noise streams.
    pub fn event_hasher(&self, domain: &str) -> KeyedHash64 {
        match self.event_hash {
            EventHash::Blake3 => self.hasher64(domain),
            EventHash::SipHash24 => {
                let mut derive = blake3::Hasher::new_derive_key(SIPHASH_CONTEXT);
                derive.update(&self.bytes);
                derive.update(domain.as_bytes());
                let subkey = *derive.finalize().as_bytes();
                let (k0, k1) = (le_u64(&subkey[..8]), le_u64(&subkey[8..16]));
                KeyedHash64(Keyed::Sip(siphasher::sip::SipHasher24::new_with_keys(
                    k0, k1,
                )))
            }
        }
    }
}

/// The little-endian u64 of 8 bytes.
fn le_u64(bytes: &[u8]) -> u64 {
    let mut word = [0u8; 8];
    word.copy_from_slice(bytes);
    u64::from_le_bytes(word)
}

/// A keyed 64-bit hash for one domain, key precomputed ([`NoiseKey::hasher64`],
/// [`NoiseKey::event_hasher`]). The key is derived from the secret key, so it is as
/// secret: `Debug` redacts it.
#[derive(Clone)]
pub struct KeyedHash64(Keyed);

#[derive(Clone)]
enum Keyed {
    /// BLAKE3 keyed mode with this subkey.
    Blake3([u8; 32]),
    /// SipHash-2-4 with its keys set, before any input.
    Sip(siphasher::sip::SipHasher24),
}

impl fmt::Debug for KeyedHash64 {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("KeyedHash64(<redacted>)")
    }
}

impl KeyedHash64 {
    /// The hash of `data`: `hash64(domain, data)` for a [`NoiseKey::hasher64`].
    pub fn hash(&self, data: &[u8]) -> u64 {
        match &self.0 {
            Keyed::Blake3(subkey) => le_u64(&blake3::keyed_hash(subkey, data).as_bytes()[..8]),
            Keyed::Sip(keyed) => {
                use std::hash::Hasher as _;
                let mut h = *keyed;
                h.write(data);
                h.finish()
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Fallback bookkeeping (tests only): lets tests prove that a case really took the BigUint path.

#[cfg(test)]
thread_local! {
    static BIG_FALLBACKS: std::cell::Cell<u64> = const { std::cell::Cell::new(0) };
}

/// Records one switch from `u128` to `BigUint` arithmetic (counted in tests, free otherwise).
#[inline]
fn note_big_fallback() {
    #[cfg(test)]
    BIG_FALLBACKS.with(|count| count.set(count.get() + 1));
}

// ---------------------------------------------------------------------------------------------
// Uniform integers and Bernoulli trials.

/// A uniform integer in `0..n`, without bias.
///
/// Draws `⌈log₂ n⌉` random bits and rejects values `>= n` (common practice: "bitmask with
/// rejection"); each try succeeds with probability above 1/2.
///
/// # Panics
/// If `n == 0` (the range is empty).
pub fn uniform_below<R: Rng + ?Sized>(rng: &mut R, n: u128) -> u128 {
    assert!(n >= 1, "uniform_below needs n >= 1");
    let max = n - 1;
    let n_bits = 128 - max.leading_zeros();
    if n_bits == 0 {
        return 0;
    }
    let mask = u128::MAX >> (128 - n_bits);
    loop {
        let raw = if n_bits <= 64 {
            u128::from(rng.next_u64())
        } else {
            (u128::from(rng.next_u64()) << 64) | u128::from(rng.next_u64())
        };
        let candidate = raw & mask;
        if candidate < n {
            return candidate;
        }
    }
}

/// [`uniform_below`] for arbitrary-size `n`: a uniform integer in `0..n`.
///
/// # Panics
/// If `n` is zero.
pub fn uniform_below_big<R: Rng + ?Sized>(rng: &mut R, n: &BigUint) -> BigUint {
    assert!(!n.is_zero(), "uniform_below_big needs n >= 1");
    let max = n - 1u32;
    let n_bits = max.bits();
    if n_bits == 0 {
        return BigUint::zero();
    }
    let n_digits = n_bits.div_ceil(32) as usize;
    let top_bits = n_bits - 32 * (n_digits as u64 - 1);
    let top_mask = u32::MAX >> (32 - top_bits);
    let mut digits = vec![0u32; n_digits];
    loop {
        for digit in digits.iter_mut() {
            *digit = rng.next_u32();
        }
        if let Some(top) = digits.last_mut() {
            *top &= top_mask;
        }
        let candidate = BigUint::from_slice(&digits);
        if &candidate < n {
            return candidate;
        }
    }
}

/// A Bernoulli trial with `P[true] = num/den` (CKS20 Algorithm "Bern(n/d)", privacy-math §3 A0):
/// draw `D` uniform in `{0..den-1}` and return `D < num`, which has probability exactly
/// `num/den`. Values `num >= den` mean probability 1.
///
/// # Panics
/// If `den == 0`.
pub fn bernoulli_ratio<R: Rng + ?Sized>(rng: &mut R, num: u128, den: u128) -> bool {
    assert!(den >= 1, "bernoulli_ratio needs den >= 1");
    if num >= den {
        return true;
    }
    uniform_below(rng, den) < num
}

/// [`bernoulli_ratio`] on arbitrary-size integers.
fn bernoulli_ratio_big<R: Rng + ?Sized>(rng: &mut R, num: &BigUint, den: &BigUint) -> bool {
    if num >= den {
        return true;
    }
    &uniform_below_big(rng, den) < num
}

/// A Bernoulli trial with `P[true] = exp(-num/den)` (CKS20 Algorithm 1, privacy-math §3 A1).
///
/// For γ = num/den ≤ 1, von Neumann's trick: with `K ← 1`, draw `A ← Bern(γ/K)` until `A = 0`,
/// incrementing `K` after each 1, and return whether `K` is odd. `P[K = k] = γ^{k-1}/(k-1)! -
/// γ^k/k!`, so `P[K odd] = Σ_j (-γ)^j/j! = e^{-γ}`. For γ > 1 the result is the AND of `⌊γ⌋`
/// trials of `Bern(e^{-1})` and one of `Bern(e^{-(γ-⌊γ⌋)})`, stopping at the first 0.
///
/// # Panics
/// If `den == 0`.
pub fn bernoulli_exp_neg<R: Rng + ?Sized>(rng: &mut R, num: u128, den: u128) -> bool {
    assert!(den >= 1, "bernoulli_exp_neg needs den >= 1");
    let n_whole = num / den;
    let frac_num = num % den;
    let mut n_done: u128 = 0;
    while n_done < n_whole {
        if !bernoulli_exp_neg_unit(rng, 1, 1) {
            return false;
        }
        n_done += 1;
    }
    bernoulli_exp_neg_unit(rng, frac_num, den)
}

/// `Bern(exp(-num/den))` for `num <= den` (the γ ≤ 1 loop of CKS20 Algorithm 1).
fn bernoulli_exp_neg_unit<R: Rng + ?Sized>(rng: &mut R, num: u128, den: u128) -> bool {
    let mut k: u128 = 1;
    loop {
        // A ← Bern(num / (den·k)); den·k overflows only for den near 2^128 or huge k, and the
        // BigUint trial has the same probability.
        let a = match den.checked_mul(k) {
            Some(den_k) => bernoulli_ratio(rng, num, den_k),
            None => {
                note_big_fallback();
                bernoulli_ratio_big(rng, &BigUint::from(num), &(BigUint::from(den) * k))
            }
        };
        if !a {
            return k % 2 == 1;
        }
        // k grows past k with probability γ^k/k!, so it never nears u128::MAX.
        k += 1;
    }
}

/// [`bernoulli_exp_neg`] on arbitrary-size integers (`den > 0`).
fn bernoulli_exp_neg_big<R: Rng + ?Sized>(rng: &mut R, num: &BigUint, den: &BigUint) -> bool {
    let n_whole = num / den;
    let frac_num = num % den;
    let mut n_done = BigUint::zero();
    while n_done < n_whole {
        if !bernoulli_exp_neg_unit(rng, 1, 1) {
            return false;
        }
        n_done += 1u32;
    }
    let mut k = BigUint::from(1u32);
    loop {
        let den_k = den * &k;
        if !bernoulli_ratio_big(rng, &frac_num, &den_k) {
            return (&k % 2u32) == BigUint::from(1u32);
        }
        k += 1u32;
    }
}

// ---------------------------------------------------------------------------------------------
// Discrete Laplace and discrete Gaussian.

/// An unsigned sample magnitude: `u128` on the fast path, `BigUint` after a fallback.
enum Magnitude {
    Small(u128),
    Big(BigUint),
}

impl Magnitude {
    fn is_zero(&self) -> bool {
        match self {
            Magnitude::Small(m) => *m == 0,
            Magnitude::Big(m) => m.is_zero(),
        }
    }

    /// `±magnitude` as `i128`, saturating at `±i128::MAX`. Callers document when saturation can
    /// happen (only for scales beyond 2^120, far outside any use in scrim).
    fn signed_i128(&self, negative: bool) -> i128 {
        let abs = match self {
            Magnitude::Small(m) => i128::try_from(*m).unwrap_or(i128::MAX),
            Magnitude::Big(m) => m.to_i128().unwrap_or(i128::MAX),
        };
        if negative { -abs } else { abs }
    }
}

/// One draw of CKS20 Algorithm 2 (privacy-math §3 A2) as (negative?, |x|), with
/// `P[x] ∝ exp(-|x|·s/t)`.
///
/// Why it is exact: `U` uniform in `0..t` kept with probability `e^{-U/t}` has
/// `P[U=u] ∝ e^{-u/t}`; `V` (count of `Bern(e^{-1})` successes) has `P[V=v] ∝ e^{-v}`; so
/// `X = U + tV` has `P[X=x] ∝ e^{-x/t}` on `x ≥ 0`, and `Y = ⌊X/s⌋` has `P[Y=y] ∝ e^{-ys/t}`.
/// A fair sign with `-0` rejected gives `P[±y] ∝ e^{-|y|s/t}` on all of ℤ.
fn discrete_laplace_parts<R: Rng + ?Sized>(rng: &mut R, s: u128, t: u128) -> (bool, Magnitude) {
    loop {
        let u = uniform_below(rng, t);
        if !bernoulli_exp_neg(rng, u, t) {
            continue;
        }
        let mut v: u128 = 0;
        // v exceeds n with probability e^{-n}; it cannot reach u128::MAX.
        while bernoulli_exp_neg_unit(rng, 1, 1) {
            v += 1;
        }
        let magnitude = match t.checked_mul(v).and_then(|tv| tv.checked_add(u)) {
            Some(x) => Magnitude::Small(x / s),
            None => {
                note_big_fallback();
                Magnitude::Big((BigUint::from(t) * v + u) / s)
            }
        };
        let negative = uniform_below(rng, 2) == 1;
        if negative && magnitude.is_zero() {
            continue;
        }
        return (negative, magnitude);
    }
}

/// A discrete Laplace sample: `P[x] ∝ exp(-|x|·s/t)` for `x ∈ ℤ`, i.e. `L_Z(t/s)` with
/// `q = e^{-s/t}` and `P[x] = (1-q)/(1+q)·q^{|x|}` (CKS20 Algorithm 2, privacy-math §3 A2).
///
/// Adding `L_Z(t/s)` to an integer query with L1 sensitivity Δ₁ gives `(Δ₁·s/t)`-DP
/// (privacy-math §3, \[D\]: the pmf ratio at neighbouring outputs is at most `e^{Δ₁ s/t}`).
///
/// Exact for every `s, t ≥ 1`. The result saturates at `±i128::MAX`, which needs
/// `|x| ≥ 2^127` and has probability below `e^{-128}` whenever `t/s ≤ 2^120`; use
/// [`discrete_laplace_big`] for larger scales.
///
/// # Panics
/// If `s == 0` or `t == 0`.
pub fn discrete_laplace<R: Rng + ?Sized>(rng: &mut R, s: u128, t: u128) -> i128 {
    assert!(s >= 1 && t >= 1, "discrete_laplace needs s, t >= 1");
    let (negative, magnitude) = discrete_laplace_parts(rng, s, t);
    magnitude.signed_i128(negative)
}

/// [`discrete_laplace`] on arbitrary-size parameters and output, all in `BigUint` arithmetic.
///
/// # Panics
/// If `s` or `t` is zero.
pub fn discrete_laplace_big<R: Rng + ?Sized>(rng: &mut R, s: &BigUint, t: &BigUint) -> BigInt {
    assert!(
        !s.is_zero() && !t.is_zero(),
        "discrete_laplace_big needs s, t >= 1"
    );
    loop {
        let u = uniform_below_big(rng, t);
        if !bernoulli_exp_neg_big(rng, &u, t) {
            continue;
        }
        let mut v = BigUint::zero();
        while bernoulli_exp_neg_unit(rng, 1, 1) {
            v += 1u32;
        }
        let y = (t * v + u) / s;
        let negative = uniform_below(rng, 2) == 1;
        if negative && y.is_zero() {
            continue;
        }
        let sign = if negative { Sign::Minus } else { Sign::Plus };
        return BigInt::from_biguint(sign, y);
    }
}

/// A discrete Gaussian sample `N_Z(0, σ²)`, `P[x] ∝ exp(-x²/(2σ²))` for `x ∈ ℤ`, with
/// `σ² = sigma2_num / sigma2_den` (CKS20 Algorithm 3, privacy-math §3 A3).
///
/// Proposal `Y ~ L_Z(t)` with `t = ⌊σ⌋ + 1`, accepted with probability
/// `exp(-(|Y| - σ²/t)²/(2σ²))`. Why it is exact for any `t > 0` \[D\]: the proposal weight times
/// the acceptance is `exp(-|y|/t - y²/(2σ²) + |y|/t - σ²/(2t²)) ∝ exp(-y²/(2σ²))`; the choice
/// `t = ⌊σ⌋+1` only keeps the expected number of rounds small. `⌊σ⌋ = isqrt(⌊num/den⌋)` because
/// `k² ≤ x ⇔ k² ≤ ⌊x⌋` for integers `k`. The acceptance exponent is the rational
/// `(|Y|·den·t − num)² / (2·num·den·t²)`.
///
/// Privacy: added per coordinate to an integer vector with L2 sensitivity Δ₂ it gives
/// `Δ₂²/(2σ²)`-zCDP, the same as the continuous Gaussian (CKS20; see
/// [`crate::engine::accounting::gaussian_rho`], whose test checks it by brute force).
///
/// `sigma2_num == 0` returns 0 (the point mass). The output saturates at `±i128::MAX`, which
/// would need a draw beyond 2^127 > 2^63·σ (σ < 2^64): probability about e^{-2^125}.
///
/// # Panics
/// If `sigma2_den == 0`.
pub fn discrete_gaussian<R: Rng + ?Sized>(rng: &mut R, sigma2_num: u128, sigma2_den: u128) -> i128 {
    assert!(sigma2_den >= 1, "discrete_gaussian needs sigma2_den >= 1");
    if sigma2_num == 0 {
        return 0;
    }
    // isqrt(u128::MAX) + 1 = 2^64 cannot overflow.
    let t = (sigma2_num / sigma2_den).isqrt() + 1;
    loop {
        let (negative, magnitude) = discrete_laplace_parts(rng, 1, t);
        let exponent = match &magnitude {
            Magnitude::Small(y) => gaussian_exponent_u128(*y, sigma2_num, sigma2_den, t),
            Magnitude::Big(_) => None,
        };
        let accept = match exponent {
            Some((num, den)) => bernoulli_exp_neg(rng, num, den),
            None => {
                note_big_fallback();
                let y = match &magnitude {
                    Magnitude::Small(y) => BigUint::from(*y),
                    Magnitude::Big(y) => y.clone(),
                };
                let (num, den) = gaussian_exponent_big(
                    &y,
                    &BigUint::from(sigma2_num),
                    &BigUint::from(sigma2_den),
                    &BigUint::from(t),
                );
                bernoulli_exp_neg_big(rng, &num, &den)
            }
        };
        if accept {
            return magnitude.signed_i128(negative);
        }
    }
}

/// The CKS20 acceptance exponent `(y·d·t − n)² / (2·n·d·t²)` in `u128`, or `None` on overflow.
fn gaussian_exponent_u128(y: u128, n: u128, d: u128, t: u128) -> Option<(u128, u128)> {
    let ydt = y.checked_mul(d)?.checked_mul(t)?;
    let diff = ydt.abs_diff(n);
    let num = diff.checked_mul(diff)?;
    let den = n
        .checked_mul(2)?
        .checked_mul(d)?
        .checked_mul(t)?
        .checked_mul(t)?;
    Some((num, den))
}

/// [`gaussian_exponent_u128`] in `BigUint`.
fn gaussian_exponent_big(y: &BigUint, n: &BigUint, d: &BigUint, t: &BigUint) -> (BigUint, BigUint) {
    let ydt = y * d * t;
    let diff = if &ydt >= n { ydt - n } else { n - ydt };
    let num = &diff * &diff;
    let den = n * 2u32 * d * t * t;
    (num, den)
}

/// [`discrete_gaussian`] on arbitrary-size σ² = `sigma2_num / sigma2_den` and output, all in
/// `BigUint` arithmetic.
///
/// # Panics
/// If `sigma2_den` is zero.
pub fn discrete_gaussian_big<R: Rng + ?Sized>(
    rng: &mut R,
    sigma2_num: &BigUint,
    sigma2_den: &BigUint,
) -> BigInt {
    assert!(
        !sigma2_den.is_zero(),
        "discrete_gaussian_big needs sigma2_den >= 1"
    );
    if sigma2_num.is_zero() {
        return BigInt::zero();
    }
    let t = (sigma2_num / sigma2_den).sqrt() + 1u32;
    let one = BigUint::from(1u32);
    loop {
        let y = discrete_laplace_big(rng, &one, &t);
        let (sign, magnitude) = y.into_parts();
        let (num, den) = gaussian_exponent_big(&magnitude, sigma2_num, sigma2_den, &t);
        if bernoulli_exp_neg_big(rng, &num, &den) {
            return BigInt::from_biguint(sign, magnitude);
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Variances.

/// Exact variance of `N_Z(0, σ²)` as `f64` (used for error bars and estimator weights).
///
/// For σ < 3 (σ² < 9): direct summation of `x²·e^{-x²/(2σ²)}` over `|x| ≤ 60·max(σ,1)+60`,
/// beyond which every term is below `e^{-1800}` of the centre (privacy-math §3 uses the same
/// range, \[C\]).
///
/// For σ ≥ 3 it returns σ². Bound \[D\]: Poisson summation gives
/// `Σ_x e^{-x²/(2σ²)} = √(2π)σ·(1 + 2S)`, `S = Σ_{k≥1} e^{-2π²σ²k²}`; differentiating in σ,
/// `σ² − Var = 8π²σ⁴·Σ_k k² e^{-2π²σ²k²} / (1 + 2S) ≤ 16π²σ⁴ e^{-2π²σ²}` for σ ≥ 1 (the k ≥ 2
/// terms sum to less than the k = 1 term). The relative gap `16π²σ² e^{-2π²σ²}` decreases for
/// σ ≥ 1 and is about 1.0e-74 at σ = 3, far below f64 resolution (1.1e-16).
///
/// `sigma2 == 0` gives 0; negative or NaN input gives NaN.
pub fn discrete_gaussian_variance(sigma2: f64) -> f64 {
    if sigma2.is_nan() || sigma2 < 0.0 {
        return f64::NAN;
    }
    if sigma2 == 0.0 {
        return 0.0;
    }
    if sigma2 >= 9.0 {
        return sigma2;
    }
    let sigma = sigma2.sqrt();
    let radius = (60.0 * sigma.max(1.0)).ceil() as i64 + 60;
    // Sum from the tails inwards so small terms are added first.
    let mut weight_sum = 0.0;
    let mut second_moment_sum = 0.0;
    for x in (1..=radius).rev() {
        let xf = x as f64;
        let weight = (-xf * xf / (2.0 * sigma2)).exp();
        weight_sum += weight;
        second_moment_sum += xf * xf * weight;
    }
    // Symmetric: the negative half doubles both sums; x = 0 adds weight 1.
    2.0 * second_moment_sum / (1.0 + 2.0 * weight_sum)
}

/// Variance of the discrete Laplace `L_Z(t)` (`P[x] ∝ e^{-|x|/t}`): `2q/(1−q)²`, `q = e^{-1/t}`
/// (privacy-math §3, \[D; C by summation\]). For [`discrete_laplace`]`(s, t)` pass `t/s`.
///
/// `1 − q` is computed as `-expm1(-1/t)` so large `t` keeps full precision (the value tends to
/// `2t² − 1/6`). `t == 0` gives 0; negative or NaN input gives NaN.
pub fn discrete_laplace_variance(t: f64) -> f64 {
    if t.is_nan() || t < 0.0 {
        return f64::NAN;
    }
    if t == 0.0 {
        return 0.0;
    }
    let q = (-1.0 / t).exp();
    let one_minus_q = -(-1.0 / t).exp_m1();
    2.0 * q / (one_minus_q * one_minus_q)
}

#[cfg(test)]
mod tests {
    //! Every statistical test here uses a fixed seed (`ChaCha20Rng::seed_from_u64`), so each run
    //! sees the same draws and the verdict is deterministic, never flaky.
    //!
    //! Significance: a Pearson χ² test fails when its p-value is below [`P_MIN`] = 1e-3. For a
    //! correct sampler p is uniform on (0, 1), so a fixed seed trips the threshold with
    //! probability 1e-3 per test; across the ~20 χ² checks here a correct implementation passes
    //! all of them for about 98% of seed choices, while real defects (a wrong scale, an
    //! off-by-one support, a biased sign) push p far below 1e-3 at these sample sizes (common
    //! practice for fixed-seed statistical tests). Moment checks use ±[`Z_MAX`] = 5 standard
    //! errors from the central limit theorem (two-sided normal tail 5.7e-7).
    //!
    //! Power: at 50 000 draws the mean-square check flags a variance error above
    //! 5·√(2/50 000) ≈ 3.2% (Gaussian fourth moment), and the χ² tests catch support or sign
    //! errors outright. Subtler algebra errors are caught deterministically instead: the
    //! acceptance exponent is compared with CKS20's formula exactly
    //! (`acceptance_exponent_matches_cks_formula`). The 10^6-draw versions (variance errors
    //! above ≈ 0.7%) are `#[ignore]`d; run them with
    //! `cargo test --release -- --ignored noise_heavy`.

    use super::*;
    use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};
    use std::collections::HashSet;

    /// χ² significance threshold (see the module comment for why).
    const P_MIN: f64 = 1e-3;
    /// Moment checks: allowed distance in CLT standard errors.
    const Z_MAX: f64 = 5.0;
    /// Draws per case in the default run (keeps the module's tests to a few seconds).
    const N_DRAWS: usize = 50_000;
    /// Draws per case in the ignored heavy run.
    const N_DRAWS_HEAVY: usize = 1_000_000;

    fn seeded(seed: u64) -> ChaCha20Rng {
        ChaCha20Rng::seed_from_u64(seed)
    }

    fn fallbacks() -> u64 {
        BIG_FALLBACKS.with(|count| count.get())
    }

    /// An exact pmf on `lo..lo + probs.len()`, normalised by direct summation over a radius
    /// beyond which the remaining mass is below f64 resolution (same radii as privacy-math
    /// §3's discrete.py).
    struct Pmf {
        lo: i64,
        probs: Vec<f64>,
    }

    impl Pmf {
        fn from_weights(radius: i64, weight: impl Fn(i64) -> f64) -> Pmf {
            let weights: Vec<f64> = (-radius..=radius).map(weight).collect();
            let total: f64 = weights.iter().sum();
            Pmf {
                lo: -radius,
                probs: weights.iter().map(|w| w / total).collect(),
            }
        }

        /// `N_Z(0, σ²)`: `P[x] ∝ exp(-x²/(2σ²))` (CKS20 definition, privacy-math §3).
        fn discrete_gaussian(sigma2: f64) -> Pmf {
            let radius = (60.0 * sigma2.sqrt().max(1.0)).ceil() as i64 + 60;
            Pmf::from_weights(radius, |x| (-((x * x) as f64) / (2.0 * sigma2)).exp())
        }

        /// `L_Z(scale)`: `P[x] ∝ exp(-|x|/scale)` (CKS20 definition, privacy-math §3).
        fn discrete_laplace(scale: f64) -> Pmf {
            let radius = (80.0 * scale).ceil() as i64 + 80;
            Pmf::from_weights(radius, |x| (-(x.abs() as f64) / scale).exp())
        }

        fn moment(&self, power: i32) -> f64 {
            self.probs
                .iter()
                .enumerate()
                .map(|(i, p)| ((self.lo + i as i64) as f64).powi(power) * p)
                .sum()
        }
    }

    /// Cells for Pearson's test: consecutive bins of `bin_width` integers merged left to right
    /// until each cell expects at least 5 draws (Cochran's rule, common practice); a short
    /// remainder joins the last cell. Draws outside the pmf's range count in the end cells.
    struct Cells {
        lo: i64,
        bin_width: i64,
        cell_of_bin: Vec<usize>,
        probs: Vec<f64>,
    }

    impl Cells {
        fn new(pmf: &Pmf, n_draws: usize, bin_width: i64) -> Cells {
            let width = bin_width as usize;
            let mut bin_probs = vec![0.0; pmf.probs.len().div_ceil(width)];
            for (i, p) in pmf.probs.iter().enumerate() {
                bin_probs[i / width] += p;
            }
            let min_prob = 5.0 / n_draws as f64;
            let mut cell_of_bin = Vec::with_capacity(bin_probs.len());
            let mut probs: Vec<f64> = Vec::new();
            let mut open = 0.0;
            for p in bin_probs {
                cell_of_bin.push(probs.len());
                open += p;
                if open >= min_prob {
                    probs.push(open);
                    open = 0.0;
                }
            }
            let last = probs.len() - 1;
            probs[last] += open;
            for cell in cell_of_bin.iter_mut() {
                *cell = (*cell).min(last);
            }
            Cells {
                lo: pmf.lo,
                bin_width,
                cell_of_bin,
                probs,
            }
        }

        fn counts(&self, samples: &[i128]) -> Vec<f64> {
            let hi = self.lo + self.cell_of_bin.len() as i64 * self.bin_width - 1;
            let mut counts = vec![0.0; self.probs.len()];
            for &x in samples {
                let clamped = x.clamp(i128::from(self.lo), i128::from(hi)) as i64;
                counts[self.cell_of_bin[((clamped - self.lo) / self.bin_width) as usize]] += 1.0;
            }
            counts
        }
    }

    fn chi_square_sf(stat: f64, df: usize) -> f64 {
        ChiSquared::new(df as f64).expect("df >= 1").sf(stat)
    }

    /// Pearson χ² goodness of fit of `samples` to `pmf`; returns the p-value (statrs χ² sf).
    fn pearson_p(samples: &[i128], pmf: &Pmf, bin_width: i64) -> f64 {
        let cells = Cells::new(pmf, samples.len(), bin_width);
        let observed = cells.counts(samples);
        let n = samples.len() as f64;
        let stat: f64 = observed
            .iter()
            .zip(&cells.probs)
            .map(|(o, p)| (o - n * p).powi(2) / (n * p))
            .sum();
        chi_square_sf(stat, cells.probs.len() - 1)
    }

    /// Pearson χ² test of homogeneity of two samples over the cells of `pmf`; returns p.
    fn homogeneity_p(a: &[i128], b: &[i128], pmf: &Pmf, bin_width: i64) -> f64 {
        let cells = Cells::new(pmf, a.len().min(b.len()), bin_width);
        let (count_a, count_b) = (cells.counts(a), cells.counts(b));
        let (n_a, n_b) = (a.len() as f64, b.len() as f64);
        let n_total = n_a + n_b;
        let mut stat = 0.0;
        let mut n_used_cells = 0;
        for (o_a, o_b) in count_a.iter().zip(&count_b) {
            let column = o_a + o_b;
            if column == 0.0 {
                continue;
            }
            n_used_cells += 1;
            let (e_a, e_b) = (n_a * column / n_total, n_b * column / n_total);
            stat += (o_a - e_a).powi(2) / e_a + (o_b - e_b).powi(2) / e_b;
        }
        chi_square_sf(stat, n_used_cells - 1)
    }

    /// Sample mean and mean square against exact moments (mean 0 by symmetry), each within
    /// `Z_MAX` CLT standard errors: SE(mean) = √(Var/n), SE(mean square) = √((E x⁴ − Var²)/n).
    fn assert_moments(samples: &[i128], var: f64, fourth: f64, what: &str) {
        let n = samples.len() as f64;
        let mean = samples.iter().map(|&x| x as f64).sum::<f64>() / n;
        let mean_square = samples.iter().map(|&x| (x as f64).powi(2)).sum::<f64>() / n;
        let z_mean = mean / (var / n).sqrt();
        let z_square = (mean_square - var) / ((fourth - var * var) / n).sqrt();
        assert!(z_mean.abs() < Z_MAX, "{what}: mean {mean}, z = {z_mean}");
        assert!(
            z_square.abs() < Z_MAX,
            "{what}: mean square {mean_square} vs {var}, z = {z_square}"
        );
    }

    /// One sampler case checked against its exact pmf.
    #[derive(Clone, Copy, Debug)]
    enum Case {
        /// `discrete_gaussian(num, den)`, χ² over bins of `bin_width` integers.
        Gauss {
            num: u128,
            den: u128,
            bin_width: i64,
        },
        /// `discrete_laplace(s, t)`.
        Laplace { s: u128, t: u128 },
    }

    /// The brief's cases: σ² = 1/4, 4, 25, 10^6 (binned) and (s, t) = (1,1), (1,3), (2,5).
    const CASES: [Case; 7] = [
        Case::Gauss {
            num: 1,
            den: 4,
            bin_width: 1,
        },
        Case::Gauss {
            num: 4,
            den: 1,
            bin_width: 1,
        },
        Case::Gauss {
            num: 25,
            den: 1,
            bin_width: 1,
        },
        Case::Gauss {
            num: 1_000_000,
            den: 1,
            bin_width: 50,
        },
        Case::Laplace { s: 1, t: 1 },
        Case::Laplace { s: 1, t: 3 },
        Case::Laplace { s: 2, t: 5 },
    ];

    fn run_case(case: Case, seed: u64, n_draws: usize) {
        let mut rng = seeded(seed);
        let (samples, pmf, bin_width): (Vec<i128>, Pmf, i64) = match case {
            Case::Gauss {
                num,
                den,
                bin_width,
            } => (
                (0..n_draws)
                    .map(|_| discrete_gaussian(&mut rng, num, den))
                    .collect(),
                Pmf::discrete_gaussian(num as f64 / den as f64),
                bin_width,
            ),
            Case::Laplace { s, t } => (
                (0..n_draws)
                    .map(|_| discrete_laplace(&mut rng, s, t))
                    .collect(),
                Pmf::discrete_laplace(t as f64 / s as f64),
                1,
            ),
        };
        let p = pearson_p(&samples, &pmf, bin_width);
        assert!(p >= P_MIN, "{case:?}: chi-square p = {p}");
        assert_moments(&samples, pmf.moment(2), pmf.moment(4), &format!("{case:?}"));
    }

    #[test]
    fn discrete_gaussian_sigma2_quarter_fits_exact_pmf() {
        run_case(CASES[0], 101, N_DRAWS);
    }

    #[test]
    fn discrete_gaussian_sigma2_4_fits_exact_pmf() {
        run_case(CASES[1], 102, N_DRAWS);
    }

    #[test]
    fn discrete_gaussian_sigma2_25_fits_exact_pmf() {
        run_case(CASES[2], 103, N_DRAWS);
    }

    #[test]
    fn discrete_gaussian_sigma2_1e6_fits_exact_pmf_binned() {
        run_case(CASES[3], 104, N_DRAWS);
    }

    #[test]
    fn discrete_laplace_1_1_fits_exact_pmf() {
        run_case(CASES[4], 105, N_DRAWS);
    }

    #[test]
    fn discrete_laplace_1_3_fits_exact_pmf() {
        run_case(CASES[5], 106, N_DRAWS);
    }

    #[test]
    fn discrete_laplace_2_5_fits_exact_pmf() {
        run_case(CASES[6], 107, N_DRAWS);
    }

    /// 10^6 draws per case: `cargo test --release -- --ignored noise_heavy`.
    #[test]
    #[ignore = "heavy: 10^6 draws per case"]
    fn noise_heavy_goodness_of_fit() {
        for (i, case) in CASES.iter().enumerate() {
            run_case(*case, 900 + i as u64, N_DRAWS_HEAVY);
        }
    }

    /// Brute force for the privacy claim in [`discrete_laplace`]'s doc: for `L_Z(t/s)` (pmf
    /// normalised by direct summation) the largest log-ratio between outputs Δ apart is
    /// exactly `Δ·s/t`, so adding it to a query with L1 sensitivity Δ is `(Δ s/t)`-DP.
    #[test]
    fn discrete_laplace_privacy_loss_is_delta_s_over_t() {
        for (s, t) in [(1u32, 1u32), (1, 3), (2, 5)] {
            let pmf = Pmf::discrete_laplace(f64::from(t) / f64::from(s));
            for shift in [1usize, 2, 3] {
                let max_loss = (0..pmf.probs.len() - shift)
                    .filter(|&i| pmf.probs[i] > 1e-200 && pmf.probs[i + shift] > 1e-200)
                    .map(|i| (pmf.probs[i].ln() - pmf.probs[i + shift].ln()).abs())
                    .fold(0.0, f64::max);
                let claimed = shift as f64 * f64::from(s) / f64::from(t);
                assert!(
                    (max_loss - claimed).abs() < 1e-9,
                    "s = {s}, t = {t}, shift = {shift}: {max_loss} vs {claimed}"
                );
            }
        }
    }

    #[test]
    fn degenerate_and_invalid_parameters() {
        let mut rng = seeded(1);
        assert_eq!(discrete_gaussian(&mut rng, 0, 7), 0);
        assert_eq!(
            discrete_gaussian_big(&mut rng, &BigUint::zero(), &BigUint::from(3u32)),
            BigInt::zero()
        );
        assert!(std::panic::catch_unwind(|| discrete_gaussian(&mut seeded(1), 1, 0)).is_err());
        assert!(std::panic::catch_unwind(|| discrete_laplace(&mut seeded(1), 0, 1)).is_err());
        assert!(std::panic::catch_unwind(|| uniform_below(&mut seeded(1), 0)).is_err());
    }

    /// Frequencies of `Bern(exp(-γ))` against `exp(-γ)` (CKS20 Algorithm 1), including γ > 1
    /// and a γ whose denominator forces BigUint trials; binomial z within 5 SE.
    #[test]
    fn bernoulli_exp_neg_frequencies_match_exp() {
        let half_max = u128::MAX / 2;
        let cases: [(u128, u128); 8] = [
            (1, 3),
            (1, 2),
            (1, 1),
            (3, 2),
            (7, 3),
            (5, 1),
            (half_max, u128::MAX),
            (3 * (u128::MAX / 4), u128::MAX / 4),
        ];
        let n_trials = 100_000;
        let mut rng = seeded(7);
        for (num, den) in cases {
            let p = (-(num as f64 / den as f64)).exp();
            let n_true = (0..n_trials)
                .filter(|_| bernoulli_exp_neg(&mut rng, num, den))
                .count() as f64;
            let n = n_trials as f64;
            let z = (n_true - n * p) / (n * p * (1.0 - p)).sqrt();
            assert!(
                z.abs() < Z_MAX,
                "gamma = {num}/{den}: {n_true} of {n}, z = {z}"
            );
        }
        // γ = 0 is certain (the first trial Bern(0) stops at K = 1, which is odd).
        assert!((0..100).all(|_| bernoulli_exp_neg(&mut rng, 0, 5)));
    }

    #[test]
    fn bernoulli_exp_neg_large_denominator_uses_big_trials() {
        let before = fallbacks();
        let mut rng = seeded(8);
        for _ in 0..200 {
            bernoulli_exp_neg(&mut rng, u128::MAX - 1, u128::MAX);
        }
        assert!(fallbacks() > before);
    }

    /// `Bern(num/den)` (CKS20 A0) frequencies and its certain/impossible ends.
    #[test]
    fn bernoulli_ratio_frequencies() {
        let mut rng = seeded(9);
        let n_trials = 20_000;
        for (num, den) in [(1u128, 3u128), (2, 7), (u128::MAX / 3, u128::MAX)] {
            let p = num as f64 / den as f64;
            let n = n_trials as f64;
            let n_true = (0..n_trials)
                .filter(|_| bernoulli_ratio(&mut rng, num, den))
                .count() as f64;
            let z = (n_true - n * p) / (n * p * (1.0 - p)).sqrt();
            assert!(z.abs() < Z_MAX, "{num}/{den}: z = {z}");
        }
        assert!((0..100).all(|_| !bernoulli_ratio(&mut rng, 0, 9)));
        assert!((0..100).all(|_| bernoulli_ratio(&mut rng, 9, 9)));
    }

    /// Uniformity of `uniform_below` (χ² over equal-width cells, exact cell probabilities) for
    /// small `n`, `n` just above 2^64, `n` with the top bit set, and the BigUint version.
    #[test]
    fn uniform_below_is_uniform() {
        fn check(n_cells: u128, cell_of: impl Fn(&mut ChaCha20Rng) -> u128, probs: &[f64]) {
            let mut rng = seeded(10 + n_cells as u64);
            let n_draws = 20_000;
            let mut counts = vec![0.0; probs.len()];
            for _ in 0..n_draws {
                counts[cell_of(&mut rng) as usize] += 1.0;
            }
            let n = n_draws as f64;
            let stat: f64 = counts
                .iter()
                .zip(probs)
                .map(|(o, p)| (o - n * p).powi(2) / (n * p))
                .sum();
            let p = chi_square_sf(stat, probs.len() - 1);
            assert!(p >= P_MIN, "{n_cells} cells: p = {p}");
        }
        check(7, |rng| uniform_below(rng, 7), &[1.0 / 7.0; 7]);
        // n = 3·2^126: three cells of width 2^126, each exactly 1/3.
        let n = 3u128 << 126;
        check(3, |rng| uniform_below(rng, n) >> 126, &[1.0 / 3.0; 3]);
        // n = 2^64 + 2^63: cells [0,2^63), [2^63,2^64), [2^64, n) each exactly 1/3.
        let n = (1u128 << 64) + (1u128 << 63);
        check(4, |rng| uniform_below(rng, n) >> 63, &[1.0 / 3.0; 3]);
        // BigUint: n = 5·2^200, cells of width 2^200, each 1/5.
        let n_big = BigUint::from(5u32) << 200u32;
        check(
            5,
            |rng| {
                let x: BigUint = uniform_below_big(rng, &n_big) >> 200u32;
                x.to_u128().expect("below 5")
            },
            &[0.2; 5],
        );
        assert_eq!(uniform_below(&mut seeded(1), 1), 0);
    }

    /// σ² = 2^100 forces the BigUint path for every acceptance test; the output must still be
    /// N_Z(0, 2^100). At σ = 2^50 the discrete Gaussian equals the continuous one at this bin
    /// resolution (the Poisson-summation gap is below e^{-2^100}), so the reference is statrs'
    /// `Normal` CDF over bins of σ/4, plus the moment z-tests with E x⁴ = 3σ⁴.
    #[test]
    fn big_sigma2_2_pow_100_takes_biguint_path_and_is_plausible() {
        let sigma2 = 2f64.powi(100);
        let sigma = sigma2.sqrt();
        let n_draws = 20_000;
        let before = fallbacks();
        let mut rng = seeded(11);
        let samples: Vec<i128> = (0..n_draws)
            .map(|_| discrete_gaussian(&mut rng, 1u128 << 100, 1))
            .collect();
        assert!(fallbacks() - before >= n_draws as u64);
        assert_moments(&samples, sigma2, 3.0 * sigma2 * sigma2, "sigma2 = 2^100");

        let normal = Normal::new(0.0, 1.0).expect("valid");
        let edges: Vec<f64> = (-12..=12).map(|k| f64::from(k) / 4.0).collect();
        let mut probs = vec![normal.cdf(edges[0])];
        probs.extend(
            edges
                .windows(2)
                .map(|w| normal.cdf(w[1]) - normal.cdf(w[0])),
        );
        probs.push(normal.sf(edges[edges.len() - 1]));
        let mut counts = vec![0.0; probs.len()];
        for &x in &samples {
            let z = x as f64 / sigma;
            counts[edges.iter().filter(|&&e| z >= e).count()] += 1.0;
        }
        let n = n_draws as f64;
        let stat: f64 = counts
            .iter()
            .zip(&probs)
            .map(|(o, p)| (o - n * p).powi(2) / (n * p))
            .sum();
        let p = chi_square_sf(stat, probs.len() - 1);
        assert!(p >= P_MIN, "sigma2 = 2^100 binned: p = {p}");
    }

    /// σ² = 25 written as (25·2^58)/2^58: the acceptance exponent fits u128 for |y| ≤ ~10
    /// and overflows for larger |y|, so iterations switch paths mid-draw. Must still be
    /// exactly N_Z(0, 25).
    #[test]
    fn mixed_path_sigma2_25_fits_exact_pmf() {
        let den = 1u128 << 58;
        let before = fallbacks();
        let mut rng = seeded(12);
        let samples: Vec<i128> = (0..N_DRAWS)
            .map(|_| discrete_gaussian(&mut rng, 25 * den, den))
            .collect();
        assert!(fallbacks() > before);
        let pmf = Pmf::discrete_gaussian(25.0);
        let p = pearson_p(&samples, &pmf, 1);
        assert!(p >= P_MIN, "mixed path: p = {p}");
        assert_moments(&samples, pmf.moment(2), pmf.moment(4), "mixed path");
    }

    /// s, t near u128::MAX: U + tV overflows and Bern(U/(tK)) needs BigUint, yet the output
    /// must be exactly L_Z(t/s).
    #[test]
    fn laplace_near_u128_max_takes_biguint_path_and_fits() {
        for (seed, s, t) in [(13, u128::MAX, u128::MAX), (14, 1u128 << 127, 3u128 << 125)] {
            let before = fallbacks();
            let mut rng = seeded(seed);
            let samples: Vec<i128> = (0..N_DRAWS)
                .map(|_| discrete_laplace(&mut rng, s, t))
                .collect();
            assert!(fallbacks() > before);
            // Scale t/s computed exactly: 1 and 3/4.
            let scale = if s == t { 1.0 } else { 0.75 };
            let pmf = Pmf::discrete_laplace(scale);
            let p = pearson_p(&samples, &pmf, 1);
            assert!(p >= P_MIN, "s = {s}, t = {t}: p = {p}");
            assert_moments(&samples, pmf.moment(2), pmf.moment(4), "near u128::MAX");
        }
    }

    /// The u128 and the all-BigUint implementations agree in distribution on mid cases
    /// (χ² homogeneity), and the BigUint one fits the exact pmf on its own.
    #[test]
    fn fast_and_big_paths_agree_in_distribution() {
        let mut rng = seeded(15);
        let pmf = Pmf::discrete_gaussian(25.0);
        let fast: Vec<i128> = (0..N_DRAWS)
            .map(|_| discrete_gaussian(&mut rng, 25, 1))
            .collect();
        let (n25, one) = (BigUint::from(25u32), BigUint::from(1u32));
        let big: Vec<i128> = (0..N_DRAWS)
            .map(|_| {
                discrete_gaussian_big(&mut rng, &n25, &one)
                    .to_i128()
                    .expect("small")
            })
            .collect();
        let p = homogeneity_p(&fast, &big, &pmf, 1);
        assert!(p >= P_MIN, "gaussian fast vs big: p = {p}");
        let p = pearson_p(&big, &pmf, 1);
        assert!(p >= P_MIN, "gaussian big vs pmf: p = {p}");

        let pmf = Pmf::discrete_laplace(2.5);
        let fast: Vec<i128> = (0..N_DRAWS)
            .map(|_| discrete_laplace(&mut rng, 2, 5))
            .collect();
        let (two, five) = (BigUint::from(2u32), BigUint::from(5u32));
        let big: Vec<i128> = (0..N_DRAWS)
            .map(|_| {
                discrete_laplace_big(&mut rng, &two, &five)
                    .to_i128()
                    .expect("small")
            })
            .collect();
        let p = homogeneity_p(&fast, &big, &pmf, 1);
        assert!(p >= P_MIN, "laplace fast vs big: p = {p}");
        let p = pearson_p(&big, &pmf, 1);
        assert!(p >= P_MIN, "laplace big vs pmf: p = {p}");
    }

    /// The routine range σ² ≤ 2^60 stays on u128 arithmetic (no fallback in 5000 draws) and
    /// is plausible (moment z-tests with the Gaussian E x⁴ = 3σ⁴, exact to f64 at σ = 2^30).
    #[test]
    fn fast_path_covers_sigma2_2_pow_60() {
        let sigma2 = 2f64.powi(60);
        let before = fallbacks();
        let mut rng = seeded(16);
        let samples: Vec<i128> = (0..5000)
            .map(|_| discrete_gaussian(&mut rng, 1u128 << 60, 1))
            .collect();
        assert_eq!(fallbacks(), before);
        assert_moments(&samples, sigma2, 3.0 * sigma2 * sigma2, "sigma2 = 2^60");
    }

    /// The rational acceptance exponent equals CKS20's `(|y| − σ²/t)²/(2σ²)` exactly, on
    /// both the u128 and the BigUint path: cross-multiplied, `num·(2σ²)·(d t)²` must equal
    /// `den·(|y| d t − n)²` as big integers (σ² = n/d), with `den = 2 n d t²`.
    #[test]
    fn acceptance_exponent_matches_cks_formula() {
        let cases: [(u128, u128, u128); 6] = [
            (1, 4, 1),
            (25, 1, 6),
            (1_000_000, 1, 1001),
            (7, 3, 2),
            (1 << 60, 1, (1 << 30) + 1),
            (25 << 58, 1 << 58, 6),
        ];
        for (n, d, t) in cases {
            for y in [0u128, 1, 2, 5, 17, 1000, 1 << 33] {
                let (bn, bd, bt, by) = (
                    BigUint::from(n),
                    BigUint::from(d),
                    BigUint::from(t),
                    BigUint::from(y),
                );
                // Reference: (|y| − n/(d t))² / (2 n/d) = (y d t − n)² / (d t)² · d / (2 n).
                let ydt = &by * &bd * &bt;
                let diff = if ydt >= bn { &ydt - &bn } else { &bn - &ydt };
                let ref_num = &diff * &diff * &bd;
                let ref_den = (&bd * &bt) * (&bd * &bt) * (&bn * 2u32);
                let (big_num, big_den) = gaussian_exponent_big(&by, &bn, &bd, &bt);
                assert_eq!(
                    &big_num * &ref_den,
                    &ref_num * &big_den,
                    "big {n}/{d} t={t} y={y}"
                );
                if let Some((num, den)) = gaussian_exponent_u128(y, n, d, t) {
                    assert_eq!(BigUint::from(num), big_num, "u128 num {n}/{d} y={y}");
                    assert_eq!(BigUint::from(den), big_den, "u128 den {n}/{d} y={y}");
                }
            }
        }
        // The proposal scale t = ⌊σ⌋ + 1 = isqrt(⌊n/d⌋) + 1 [D], checked against f64 sqrt.
        for (n, d) in [
            (1u128, 4u128),
            (4, 1),
            (25, 1),
            (26, 1),
            (99, 4),
            (1_000_000, 1),
        ] {
            let t = (n / d).isqrt() + 1;
            assert_eq!(t, (n as f64 / d as f64).sqrt().floor() as u128 + 1);
        }
    }

    /// privacy-math §3 table \[C\] (discrete.py, mpmath direct summation): Var N_Z(0, σ²).
    #[test]
    fn discrete_gaussian_variance_matches_privacy_math_table() {
        let table = [
            (0.25, 0.215_012_675_088_138_49),
            (1.0, 0.999_999_788_767_728_1),
            (4.0, 4.0),
            (25.0, 25.0),
        ];
        for (sigma2, expected) in table {
            let got = discrete_gaussian_variance(sigma2);
            assert!(
                ((got - expected) / expected).abs() < 1e-14,
                "sigma2 = {sigma2}: {got} vs {expected}"
            );
        }
        assert_eq!(discrete_gaussian_variance(0.0), 0.0);
        assert!(discrete_gaussian_variance(-1.0).is_nan());
    }

    /// Against an independent method: the Poisson-summation series
    /// `Var = σ² − 8π²σ⁴ Σ k² e^{-2π²σ²k²} / (1 + 2 Σ e^{-2π²σ²k²})` (derivation in
    /// [`discrete_gaussian_variance`]'s doc, \[D\]), on both sides of the σ = 3 switch. For
    /// σ ≥ 0.3 the subtraction cancels at most a factor ~12, so rel 1e-12 is generous.
    #[test]
    fn discrete_gaussian_variance_matches_poisson_summation() {
        use std::f64::consts::PI;
        for sigma in [
            0.3, 0.5, 0.8, 1.0, 1.5, 2.0, 2.9, 2.999, 3.0, 4.0, 10.0, 1e4,
        ] {
            let sigma2: f64 = sigma * sigma;
            let (mut s0, mut s2) = (0.0, 0.0);
            for k in 1..=20 {
                let kf = f64::from(k);
                let term = (-2.0 * PI * PI * sigma2 * kf * kf).exp();
                s0 += term;
                s2 += kf * kf * term;
            }
            let poisson = sigma2 - 8.0 * PI * PI * sigma2 * sigma2 * s2 / (1.0 + 2.0 * s0);
            let got = discrete_gaussian_variance(sigma2);
            assert!(
                ((got - poisson) / poisson).abs() < 1e-12,
                "sigma = {sigma}: {got} vs {poisson}"
            );
        }
    }

    /// privacy-math §3 table \[C\] (12 significant digits printed, so rel 1e-11), a direct
    /// summation, and the large-t expansion `1/(2 sinh²(1/(2t))) = 2t² − 1/6 + O(t⁻²)` \[D\].
    #[test]
    fn discrete_laplace_variance_matches_table_and_summation() {
        let table = [
            (0.5, 0.362_030_830_483),
            (1.0, 1.841_347_188_42),
            (2.0, 7.835_396_178_07),
            (5.0, 49.833_666_138_3),
            (10.0, 199.833_416_634),
        ];
        for (t, expected) in table {
            let got = discrete_laplace_variance(t);
            assert!(
                ((got - expected) / expected).abs() < 1e-11,
                "t = {t}: {got}"
            );
            let summed = Pmf::discrete_laplace(t).moment(2);
            assert!(((got - summed) / summed).abs() < 1e-12, "t = {t}: {summed}");
        }
        let t: f64 = 1e6;
        let got = discrete_laplace_variance(t);
        assert!((got - (2.0 * t * t - 1.0 / 6.0)).abs() < 1e-2, "{got}");
        assert_eq!(discrete_laplace_variance(0.0), 0.0);
        assert!(discrete_laplace_variance(f64::NAN).is_nan());
    }

    fn base_id() -> NoiseId<'static> {
        NoiseId {
            stat: "requests",
            component: 1,
            group: 2,
            epoch: 3,
            level: 4,
            index: 5,
            coord: 6,
        }
    }

    fn first_words(mut rng: ChaCha20Rng) -> [u64; 4] {
        [
            rng.next_u64(),
            rng.next_u64(),
            rng.next_u64(),
            rng.next_u64(),
        ]
    }

    #[test]
    fn same_key_and_id_give_same_stream() {
        let key = NoiseKey::from_seed(42);
        let again = NoiseKey::from_bytes(*key.as_bytes());
        assert_eq!(
            first_words(key.rng_for(&base_id())),
            first_words(again.rng_for(&base_id()))
        );
        assert_eq!(
            NoiseKey::from_seed(42).as_bytes(),
            NoiseKey::from_seed(42).as_bytes()
        );
        assert_ne!(
            NoiseKey::from_seed(42).as_bytes(),
            NoiseKey::from_seed(43).as_bytes()
        );
    }

    #[test]
    fn every_field_change_gives_a_different_stream() {
        let key = NoiseKey::from_seed(42);
        let base = base_id();
        let variants = [
            base,
            NoiseId {
                stat: "request",
                ..base
            },
            NoiseId {
                stat: "requests\0",
                ..base
            },
            NoiseId {
                component: 0,
                ..base
            },
            NoiseId { group: 0, ..base },
            NoiseId { epoch: 0, ..base },
            NoiseId { level: 0, ..base },
            NoiseId { index: 0, ..base },
            NoiseId { coord: 0, ..base },
        ];
        let mut streams: HashSet<[u64; 4]> = variants
            .iter()
            .map(|id| first_words(key.rng_for(id)))
            .collect();
        assert_eq!(streams.len(), variants.len());
        // A different key changes the stream of the same id.
        assert!(streams.insert(first_words(NoiseKey::from_seed(7).rng_for(&base))));
    }

    /// Recomputes the documented derivation by hand (tag, length-prefixed stat, fixed-width
    /// little-endian fields; BLAKE3 keyed hash as ChaCha20 seed) to pin the encoding: replays
    /// of saved state depend on it never changing silently.
    #[test]
    fn stream_seed_follows_documented_encoding() {
        let key = NoiseKey::from_bytes([7u8; 32]);
        let mut encoded = b"scrim.noise.v1\0\0".to_vec();
        encoded.extend_from_slice(&8u64.to_le_bytes());
        encoded.extend_from_slice(b"requests");
        encoded.push(1);
        encoded.extend_from_slice(&2u32.to_le_bytes());
        encoded.extend_from_slice(&3u64.to_le_bytes());
        encoded.push(4);
        encoded.extend_from_slice(&5u64.to_le_bytes());
        encoded.extend_from_slice(&6u32.to_le_bytes());
        let seed = blake3::keyed_hash(&[7u8; 32], &encoded);
        let expected = ChaCha20Rng::from_seed(*seed.as_bytes());
        assert_eq!(first_words(key.rng_for(&base_id())), first_words(expected));
    }

    /// SipHash-2-4 as the event hash uses it, against the reference vector of its paper
    /// (Aumasson & Bernstein 2012, Appendix A: key 00 01 … 0f, message 00 01 … 0e, output
    /// a129ca6149be45e5; also entry 15 of the reference implementation's vectors.h).
    #[test]
    fn siphash_event_hash_matches_the_reference_vector() {
        let k0 = u64::from_le_bytes([0, 1, 2, 3, 4, 5, 6, 7]);
        let k1 = u64::from_le_bytes([8, 9, 10, 11, 12, 13, 14, 15]);
        let h = KeyedHash64(Keyed::Sip(siphasher::sip::SipHasher24::new_with_keys(
            k0, k1,
        )));
        let message: Vec<u8> = (0u8..15).collect();
        assert_eq!(h.hash(&message), 0xa129_ca61_49be_45e5);
        // The prepared hasher is reused: a second call gives the same answer.
        assert_eq!(h.hash(&message), 0xa129_ca61_49be_45e5);
    }

    /// Event hashes are keyed and domain-separated under either scheme; the BLAKE3 scheme
    /// is `hash64` itself (what states before format 3 used), and the two schemes differ.
    #[test]
    fn event_hashers_are_keyed_and_domain_separated() {
        let key = NoiseKey::from_seed(1);
        assert_eq!(
            key.event_hash(),
            EventHash::SipHash24,
            "new keys use SipHash-2-4"
        );
        let legacy = key.clone().with_event_hash(EventHash::Blake3);
        assert_eq!(
            legacy.event_hasher("unit").hash(b"alice"),
            key.hash64("unit", b"alice")
        );
        let unit = key.event_hasher("unit");
        let h = unit.hash(b"alice");
        assert_eq!(h, key.event_hasher("unit").hash(b"alice"));
        assert_ne!(h, unit.hash(b"bob"));
        assert_ne!(h, key.event_hasher("priority").hash(b"alice"));
        assert_ne!(
            h,
            NoiseKey::from_seed(2).event_hasher("unit").hash(b"alice")
        );
        assert_ne!(h, legacy.event_hasher("unit").hash(b"alice"));
        for hash in [EventHash::Blake3, EventHash::SipHash24] {
            assert_eq!(EventHash::from_name(hash.name()), Some(hash));
        }
        assert_eq!(EventHash::from_name("siphash13"), None);
        assert!(format!("{unit:?}").contains("redacted"));
    }

    #[test]
    fn hash64_is_keyed_and_domain_separated() {
        let key = NoiseKey::from_seed(1);
        // The cached hasher gives the same values.
        let cached = key.hasher64("unit");
        assert_eq!(cached.hash(b"alice"), key.hash64("unit", b"alice"));
        assert_eq!(format!("{cached:?}"), "KeyedHash64(<redacted>)");
        let h = key.hash64("unit", b"alice");
        assert_eq!(h, key.hash64("unit", b"alice"));
        assert_ne!(h, key.hash64("unit", b"bob"));
        assert_ne!(h, key.hash64("unit2", b"alice"));
        // Moving a byte between domain and data must not collide.
        assert_ne!(key.hash64("unita", b"lice"), h);
        assert_ne!(h, NoiseKey::from_seed(2).hash64("unit", b"alice"));
        // Documented construction, recomputed by hand.
        let mut subkey_input = key.as_bytes().to_vec();
        subkey_input.extend_from_slice(b"unit");
        let subkey = blake3::derive_key(HASH64_CONTEXT, &subkey_input);
        let digest = blake3::keyed_hash(&subkey, b"alice");
        let mut first8 = [0u8; 8];
        first8.copy_from_slice(&digest.as_bytes()[..8]);
        assert_eq!(h, u64::from_le_bytes(first8));
    }

    #[test]
    fn debug_hides_the_key() {
        let key = NoiseKey::from_bytes([0xAB; 32]);
        let shown = format!("{key:?} {key:#?}");
        assert!(!shown.contains("171"), "{shown}");
        assert!(!shown.to_lowercase().contains("abab"), "{shown}");
        assert!(shown.contains("redacted"));
    }
}
