//! The benchmark's inputs: a deterministic synthetic susceptibility raster, its zones and its
//! observed total.
//!
//! The field is defined on the unit square, so every raster size shows the same landscape at a
//! different resolution. For the cell at (row, col) of a width x height raster, with
//! x = (col + 0.5) / width and y = (row + 0.5) / height:
//!
//! ```text
//! s(x, y) = BASE_LOG_ODDS + SLOPE * x + WAVE * sin(2 pi (1.3 x + 0.7 y))
//!           + sum over BUMPS bumps of a_j exp(-((x - u_j)^2 + (y - v_j)^2) / (2 r_j^2))
//! p       = clamp(logistic(s), P_MIN, P_MAX)
//! ```
//!
//! The bump centres (u_j, v_j) are uniform on the unit square, heights a_j uniform in
//! [1, 3] and radii r_j uniform in [0.04, 0.15], all drawn from SplitMix64 seeded with
//! `FIELD_SEED`. The observed total is round(prior mean + 1.5 prior sd), with the prior mean
//! sum p and sd sqrt(sum p (1 - p)). Buffer centres and baseline samples come from SplitMix64
//! streams with their own seeds. Nothing here reads a clock, a file or the environment.

use rayon::prelude::*;

use crate::engine::{Raster, Zone};

/// Seed of the susceptibility field (shared by all workloads, so they show one landscape).
pub const FIELD_SEED: u64 = 0x005e_ed0f_a11e;
/// Seed of the circular-buffer centres of the overlap workload.
pub const BUFFER_SEED: u64 = 0x0b0f_fe25;
/// Seed of the zone sample the per-zone baselines run on.
pub const SAMPLE_SEED: u64 = 0x05a3_091e;
/// Log-odds of the background: logistic(-4.2) is about 0.015.
pub const BASE_LOG_ODDS: f64 = -4.2;
/// Log-odds gained from the west edge to the east edge.
pub const SLOPE: f64 = 0.9;
/// Amplitude of the gentle sinusoid, in log-odds.
pub const WAVE: f64 = 0.35;
/// Number of Gaussian bumps (unstable slopes) in the field.
pub const BUMPS: usize = 6;
/// Probability range of the generated cells (the benchmark brief's [0.0005, 0.4]).
pub const P_MIN: f64 = 0.0005;
pub const P_MAX: f64 = 0.4;
/// The observed total sits this many prior sd above the prior mean.
pub const TOTAL_SD: f64 = 1.5;

/// SplitMix64 (Steele, Lea & Flood 2014): a tiny, well-mixed, reproducible generator.
#[derive(Clone, Debug)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    pub fn new(seed: u64) -> SplitMix64 {
        SplitMix64(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1) with 53 random bits.
    pub fn next_f64(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform in [0, n), n > 0 (multiply-shift; the bias is below 2^-32 for our n).
    pub fn below(&mut self, n: u64) -> u64 {
        ((self.next_u64() as u128 * n as u128) >> 64) as u64
    }
}

#[derive(Clone, Copy, Debug, PartialEq)]
struct Bump {
    u: f64,
    v: f64,
    height: f64,
    radius: f64,
}

/// The smooth field as a function on the unit square.
#[derive(Clone, Debug, PartialEq)]
pub struct Field {
    bumps: Vec<Bump>,
}

impl Field {
    pub fn new(seed: u64) -> Field {
        let mut rng = SplitMix64::new(seed);
        let bumps = (0..BUMPS)
            .map(|_| Bump {
                u: rng.next_f64(),
                v: rng.next_f64(),
                height: 1.0 + 2.0 * rng.next_f64(),
                radius: 0.04 + 0.11 * rng.next_f64(),
            })
            .collect();
        Field { bumps }
    }

    /// The event probability at (x, y) in the unit square.
    pub fn probability(&self, x: f64, y: f64) -> f64 {
        let mut s = BASE_LOG_ODDS
            + SLOPE * x
            + WAVE * (2.0 * std::f64::consts::PI * (1.3 * x + 0.7 * y)).sin();
        for b in &self.bumps {
            let d2 = (x - b.u).powi(2) + (y - b.v).powi(2);
            s += b.height * (-d2 / (2.0 * b.radius * b.radius)).exp();
        }
        (1.0 / (1.0 + (-s).exp())).clamp(P_MIN, P_MAX)
    }

    /// Samples the field on a width x height grid, row-major, row 0 at the top.
    pub fn raster(&self, width: u32, height: u32) -> Raster {
        let mut values = vec![0.0; width as usize * height as usize];
        values
            .par_chunks_mut(width as usize)
            .enumerate()
            .for_each(|(row, out)| {
                let y = (row as f64 + 0.5) / height as f64;
                for (col, v) in out.iter_mut().enumerate() {
                    *v = self.probability((col as f64 + 0.5) / width as f64, y);
                }
            });
        Raster::from_probabilities(width, height, values)
            .expect("the field yields probabilities by construction")
    }
}

/// The observed total of the benchmark: round(prior mean + 1.5 prior sd).
pub fn observed_total(raster: &Raster) -> u64 {
    let s = raster.stats();
    (s.sum_p + TOTAL_SD * s.sum_var.sqrt()).round() as u64
}

/// What a workload asks of the engine.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shape {
    /// Square zones of `block` x `block` cells tiling the raster.
    Partition { block: u32 },
    /// `count` discs of the given radius (cells whose centre lies within it) at seeded centres,
    /// clipped to the raster.
    Buffers { count: usize, radius: u32 },
    /// The posterior of every cell.
    Cells,
}

/// A named benchmark workload.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Workload {
    pub name: &'static str,
    pub width: u32,
    pub height: u32,
    pub shape: Shape,
    /// Whether the whole-raster baselines (a), (b) and (c) are affordable here.
    pub baselines: bool,
    /// Zones on which `engine::reference::conditional_pmf` (O(cells^2) each) also runs.
    pub reference_zones: usize,
    pub about: &'static str,
}

/// Every workload, in the order `zonetally bench` runs them.
pub const WORKLOADS: [Workload; 5] = [
    Workload {
        name: "W10k-partition",
        width: 100,
        height: 100,
        shape: Shape::Partition { block: 10 },
        baselines: true,
        reference_zones: 5,
        about: "smoke test: 100x100, 100 zones of 10x10",
    },
    Workload {
        name: "W250k-partition",
        width: 500,
        height: 500,
        shape: Shape::Partition { block: 10 },
        baselines: true,
        reference_zones: 0,
        about: "500x500, 2,500 zones of 10x10",
    },
    Workload {
        name: "W250k-overlap",
        width: 500,
        height: 500,
        shape: Shape::Buffers {
            count: 1000,
            radius: 15,
        },
        baselines: true,
        reference_zones: 0,
        about: "500x500, 1,000 discs of radius 15 cells at seeded centres",
    },
    Workload {
        name: "W250k-cells",
        width: 500,
        height: 500,
        shape: Shape::Cells,
        baselines: true,
        reference_zones: 0,
        about: "500x500, posterior of all 250,000 cells",
    },
    Workload {
        name: "W25M-partition",
        width: 5000,
        height: 5000,
        shape: Shape::Partition { block: 50 },
        baselines: false,
        reference_zones: 0,
        about: "5000x5000, 10,000 zones of 50x50",
    },
];

/// Looks a workload up by name (case-insensitive).
pub fn find(name: &str) -> Option<&'static Workload> {
    WORKLOADS.iter().find(|w| w.name.eq_ignore_ascii_case(name))
}

/// A workload's raster, zones and total, built.
pub struct Inputs {
    pub raster: Raster,
    /// The zones; for `Shape::Cells`, one singleton zone per cell (used by baseline (a) only).
    pub zones: Vec<Zone>,
    pub total: u64,
}

impl Workload {
    /// Builds the raster, zones and total. Singleton zones of `Shape::Cells` are built only when
    /// `singletons` is set (the engine's cell posterior does not need them).
    pub fn build(&self, singletons: bool) -> Inputs {
        let raster = Field::new(FIELD_SEED).raster(self.width, self.height);
        let zones = match self.shape {
            Shape::Partition { block } => partition(&raster, block),
            Shape::Buffers { count, radius } => buffers(&raster, count, radius, BUFFER_SEED),
            Shape::Cells if singletons => (0..raster.len() as u32)
                .map(|c| Zone::new(format!("c{c}"), vec![c], &raster).expect("valid cell"))
                .collect(),
            Shape::Cells => Vec::new(),
        };
        let total = observed_total(&raster);
        Inputs {
            raster,
            zones,
            total,
        }
    }
}

/// Square `block` x `block` zones tiling the raster (edge zones clipped when the size does not
/// divide), named `r{row}c{col}` by block position. Nodata cells are left out, and blocks of
/// nodata only are skipped.
pub fn partition(raster: &Raster, block: u32) -> Vec<Zone> {
    let (w, h) = (raster.width(), raster.height());
    let values = raster.values();
    let mut zones = Vec::new();
    for br in 0..h.div_ceil(block) {
        for bc in 0..w.div_ceil(block) {
            let rows = br * block..((br + 1) * block).min(h);
            let cells: Vec<u32> = rows
                .flat_map(|r| (bc * block..((bc + 1) * block).min(w)).map(move |c| r * w + c))
                .filter(|&c| !values[c as usize].is_nan())
                .collect();
            if !cells.is_empty() {
                zones.push(Zone::new(format!("r{br}c{bc}"), cells, raster).expect("valid cells"));
            }
        }
    }
    zones
}

/// `count` discs of `radius` cells at seeded centres, clipped to the raster, named `b{i}`.
pub fn buffers(raster: &Raster, count: usize, radius: u32, seed: u64) -> Vec<Zone> {
    let (w, h) = (raster.width() as i64, raster.height() as i64);
    let r = radius as i64;
    let mut rng = SplitMix64::new(seed);
    (0..count)
        .map(|i| {
            let (cr, cc) = (rng.below(h as u64) as i64, rng.below(w as u64) as i64);
            let mut cells = Vec::new();
            for row in (cr - r).max(0)..=(cr + r).min(h - 1) {
                for col in (cc - r).max(0)..=(cc + r).min(w - 1) {
                    if (row - cr).pow(2) + (col - cc).pow(2) <= r * r {
                        cells.push((row * w + col) as u32);
                    }
                }
            }
            Zone::new(format!("b{i}"), cells, raster).expect("cells in range")
        })
        .collect()
}

/// `n` distinct indices in [0, len), in increasing order, drawn by a seeded partial shuffle.
pub fn sample(len: usize, n: usize, seed: u64) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..len).collect();
    let mut rng = SplitMix64::new(seed);
    let n = n.min(len);
    for i in 0..n {
        let j = i + rng.below((len - i) as u64) as usize;
        idx.swap(i, j);
    }
    idx.truncate(n);
    idx.sort_unstable();
    idx
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_matches_its_published_first_outputs() {
        // reference: SplitMix64 reference implementation (Vigna, prng.di.unimi.it/splitmix64.c)
        // seeded with 0; first outputs as commonly quoted (from memory).
        let mut g = SplitMix64::new(0);
        assert_eq!(g.next_u64(), 0xe220_a839_7b1d_cdaf);
        assert_eq!(g.next_u64(), 0x6e78_9e6a_a1b9_65f4);
    }

    #[test]
    fn generator_is_deterministic() {
        let a = Field::new(FIELD_SEED).raster(60, 40);
        let b = Field::new(FIELD_SEED).raster(60, 40);
        assert_eq!(a.values(), b.values());
        let c = Field::new(FIELD_SEED + 1).raster(60, 40);
        assert_ne!(a.values(), c.values(), "the seed matters");
        let z1 = buffers(&a, 20, 5, BUFFER_SEED);
        let z2 = buffers(&b, 20, 5, BUFFER_SEED);
        assert_eq!(z1, z2);
        assert_eq!(sample(100, 50, SAMPLE_SEED), sample(100, 50, SAMPLE_SEED));
    }

    #[test]
    fn probabilities_stay_in_range_and_vary() {
        let r = Field::new(FIELD_SEED).raster(200, 200);
        let v = r.values();
        assert!(v.iter().all(|&p| (P_MIN..=P_MAX).contains(&p)));
        let lo = v.iter().cloned().fold(f64::INFINITY, f64::min);
        let hi = v.iter().cloned().fold(0.0, f64::max);
        // The field is not flat: the bumps lift some cells far above the background.
        assert!(hi > 5.0 * lo, "range {lo}..{hi}");
        assert_eq!(r.stats().free, 40_000);
    }

    #[test]
    fn total_follows_the_rule() {
        let r = Field::new(FIELD_SEED).raster(100, 100);
        let s = r.stats();
        // reference: closed form, Poisson-binomial mean sum p and variance sum p(1-p),
        // recomputed here from the raw values independently of RasterStats.
        let mean: f64 = r.values().iter().sum();
        let var: f64 = r.values().iter().map(|p| p * (1.0 - p)).sum();
        assert!((mean - s.sum_p).abs() < 1e-9);
        let want = (mean + 1.5 * var.sqrt()).round() as u64;
        assert_eq!(observed_total(&r), want);
        assert!(want as f64 > mean, "the total sits above the prior mean");
    }

    #[test]
    fn zones_have_the_documented_shapes() {
        let r = Field::new(FIELD_SEED).raster(100, 100);
        let p = partition(&r, 10);
        assert_eq!(p.len(), 100);
        assert!(p.iter().all(|z| z.len() == 100));
        let mut all: Vec<u32> = p.iter().flat_map(|z| z.indices()).collect();
        all.sort_unstable();
        assert_eq!(all, (0..10_000).collect::<Vec<_>>(), "a partition");
        // reference: closed form, lattice points with i^2 + j^2 <= 15^2 number 709 (Gauss circle
        // problem, N(15) = 709; from memory), so an unclipped disc holds 709 cells.
        let r500 = Field::new(FIELD_SEED).raster(500, 500);
        let b = buffers(&r500, 200, 15, BUFFER_SEED);
        assert!(b.iter().all(|z| z.len() <= 709));
        assert!(b.iter().any(|z| z.len() == 709));
        assert!(b.iter().any(|z| z.len() < 709), "some discs are clipped");
    }
}
