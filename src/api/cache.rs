//! Rasters and normalisers kept for reuse, bounded in bytes (moka), with hit and miss counts.
//!
//! Rasters are keyed by a content hash: SHA-256 over a canonical encoding of the validated
//! raster (a tag, width and height as little-endian u32, then each cell as the little-endian
//! bits of its probability, +0.0 for -0.0 and one fixed pattern for nodata). The same grid sent
//! with `null`s or with a `nodata` value, or by reference, hashes alike. Normalisers are keyed
//! by (raster hash, observed total).

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use moka::sync::Cache;
use sha2::{Digest, Sha256};

use super::decode::{DecodeError, DecodeKind, RasterSource};
use super::processes::{NormaliserSource, Uncached};
use crate::engine::{Control, EngineError, Evidence, Normaliser, Raster};

const HASH_TAG: &[u8] = b"zonetally raster v1\0";
/// Stands for a nodata cell in the hash (not a probability's bit pattern).
const NODATA_BITS: u64 = u64::MAX;

/// The content hash of a raster, as `sha256:` and 64 hex digits.
pub fn raster_hash(raster: &Raster) -> String {
    let mut h = Sha256::new();
    h.update(HASH_TAG);
    h.update(raster.width().to_le_bytes());
    h.update(raster.height().to_le_bytes());
    let mut buf = Vec::with_capacity(8 * 4096);
    for chunk in raster.values().chunks(4096) {
        buf.clear();
        for &p in chunk {
            let bits = if p.is_nan() {
                NODATA_BITS
            } else {
                (p + 0.0).to_bits()
            };
            buf.extend_from_slice(&bits.to_le_bytes());
        }
        h.update(&buf);
    }
    let digest = h.finalize();
    let mut out = String::with_capacity(7 + 64);
    out.push_str("sha256:");
    for b in digest {
        out.push_str(&format!("{b:02x}"));
    }
    out
}

/// Whether `s` looks like a hash this service hands out.
pub fn is_hash(s: &str) -> bool {
    s.strip_prefix("sha256:").is_some_and(|h| {
        h.len() == 64
            && h.bytes()
                .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
    })
}

#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct CacheStats {
    pub hits: u64,
    pub misses: u64,
    pub bytes: u64,
    pub entries: u64,
}

pub struct Caches {
    rasters: Cache<String, Arc<Raster>>,
    normalisers: Cache<(String, u64), Arc<Normaliser>>,
    raster_hits: AtomicU64,
    raster_misses: AtomicU64,
    normaliser_hits: AtomicU64,
    normaliser_misses: AtomicU64,
}

fn weight(bytes: usize) -> u32 {
    u32::try_from(bytes).unwrap_or(u32::MAX).max(1)
}

impl Caches {
    pub fn new(raster_bytes: u64, normaliser_bytes: u64) -> Caches {
        Caches {
            rasters: Cache::builder()
                .max_capacity(raster_bytes)
                .weigher(|k: &String, r: &Arc<Raster>| weight(r.heap_bytes() + k.len()))
                .build(),
            normalisers: Cache::builder()
                .max_capacity(normaliser_bytes)
                .weigher(|_: &(String, u64), n: &Arc<Normaliser>| weight(n.heap_bytes() + 128))
                .build(),
            raster_hits: AtomicU64::new(0),
            raster_misses: AtomicU64::new(0),
            normaliser_hits: AtomicU64::new(0),
            normaliser_misses: AtomicU64::new(0),
        }
    }

    /// A raster by hash, counting the hit or miss.
    pub fn raster(&self, hash: &str) -> Option<Arc<Raster>> {
        let got = self.rasters.get(hash);
        let counter = if got.is_some() {
            &self.raster_hits
        } else {
            &self.raster_misses
        };
        counter.fetch_add(1, Ordering::Relaxed);
        got
    }

    /// Keeps `raster` under its hash and returns the copy held (an equal raster already held
    /// is reused, so its memory is not doubled).
    pub fn keep_raster(&self, raster: Raster) -> (String, Arc<Raster>) {
        let hash = raster_hash(&raster);
        if let Some(held) = self.raster(&hash) {
            return (hash, held);
        }
        let held = Arc::new(raster);
        self.rasters.insert(hash.clone(), held.clone());
        (hash, held)
    }

    /// The normaliser of (raster, evidence), computed on a miss. Runs on the compute pool.
    pub fn normaliser_of(
        &self,
        hash: &str,
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Arc<Normaliser>, EngineError> {
        let key = (hash.to_string(), evidence.total());
        if let Some(n) = self.normalisers.get(&key) {
            self.normaliser_hits.fetch_add(1, Ordering::Relaxed);
            return Ok(n);
        }
        self.normaliser_misses.fetch_add(1, Ordering::Relaxed);
        let n = Arc::new(Normaliser::of(raster, evidence, control)?);
        self.normalisers.insert(key, n.clone());
        Ok(n)
    }

    pub fn raster_stats(&self) -> CacheStats {
        self.rasters.run_pending_tasks();
        CacheStats {
            hits: self.raster_hits.load(Ordering::Relaxed),
            misses: self.raster_misses.load(Ordering::Relaxed),
            bytes: self.rasters.weighted_size(),
            entries: self.rasters.entry_count(),
        }
    }

    pub fn normaliser_stats(&self) -> CacheStats {
        self.normalisers.run_pending_tasks();
        CacheStats {
            hits: self.normaliser_hits.load(Ordering::Relaxed),
            misses: self.normaliser_misses.load(Ordering::Relaxed),
            bytes: self.normalisers.weighted_size(),
            entries: self.normalisers.entry_count(),
        }
    }
}

impl RasterSource for Caches {
    fn resolve(&self, reference: &str) -> Result<(String, Arc<Raster>), DecodeError> {
        if !is_hash(reference) {
            return Err(DecodeError::at(
                "/raster/ref",
                format!("`{reference}` is not a raster reference: it must be `sha256:` and 64 lowercase hex digits, as returned by POST /rasters"),
            ));
        }
        let held = self.raster(reference).ok_or_else(|| DecodeError {
            pointer: "/raster/ref".into(),
            detail: format!("raster `{reference}` is not held by this service"),
            kind: DecodeKind::UnknownRaster {
                reference: reference.to_string(),
            },
        })?;
        Ok((reference.to_string(), held))
    }

    fn keep(&self, raster: Raster) -> (Option<String>, Arc<Raster>) {
        let (hash, held) = self.keep_raster(raster);
        (Some(hash), held)
    }
}

impl NormaliserSource for Caches {
    fn normaliser(
        &self,
        raster_key: Option<&str>,
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Arc<Normaliser>, EngineError> {
        match raster_key {
            Some(hash) => self.normaliser_of(hash, raster, evidence, control),
            None => Uncached.normaliser(None, raster, evidence, control),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nodata_spellings_and_signed_zero_hash_alike() {
        let a = Raster::new(2, 1, vec![Some(0.0), None]).unwrap();
        let b = Raster::new(2, 1, vec![Some(-0.0), None]).unwrap();
        let c = Raster::new(2, 1, vec![Some(0.0), Some(0.5)]).unwrap();
        let d = Raster::new(1, 2, vec![Some(0.0), None]).unwrap();
        assert_eq!(raster_hash(&a), raster_hash(&b));
        assert_ne!(raster_hash(&a), raster_hash(&c));
        assert_ne!(
            raster_hash(&a),
            raster_hash(&d),
            "the shape is part of the hash"
        );
        assert!(is_hash(&raster_hash(&a)));
        assert!(!is_hash("sha256:XYZ"));
    }
}
