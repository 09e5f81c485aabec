//! Rasters and normalisers kept for reuse, bounded in bytes (moka), with hit and miss counts.
//!
//! Rasters are keyed by a content hash: SHA-256 over a canonical encoding of the validated
//! raster (a tag, width and height as little-endian u32, then each cell as the little-endian
//! bits of its probability, +0.0 for -0.0 and one fixed pattern for nodata). The same grid sent
//! with `null`s or with a `nodata` value, or by reference, hashes alike. Where the raster lies
//! (geotransform, CRS) is hashed after the cells when it is known, so a raster without it keeps
//! the hash it always had. Normalisers are keyed by (raster hash, evidence key).
//!
//! Rasters linked by `href` are read from the operator's `--data-dir` only: a relative path
//! that stays inside it once resolved (no `..`, no link leading out); anything else is refused.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use moka::sync::Cache;
use sha2::{Digest, Sha256};

use super::decode::{read_bounded, DecodeError, DecodeKind, Frame, HeldRaster, RasterSource};
use super::processes::{NormaliserSource, Uncached};
use crate::engine::{Control, EngineError, Evidence, Normaliser, Raster};

const HASH_TAG: &[u8] = b"zonetally raster v1\0";
/// Stands for a nodata cell in the hash (not a probability's bit pattern).
const NODATA_BITS: u64 = u64::MAX;

/// The content hash of a raster and where it lies, as `sha256:` and 64 hex digits.
pub fn raster_hash(raster: &Raster, frame: &Frame) -> String {
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
    let grid = &frame.grid;
    if let Some(t) = grid.transform {
        h.update(b"geotransform");
        for term in t.to_gdal() {
            h.update((term + 0.0).to_bits().to_le_bytes());
        }
    }
    if let Some(crs) = grid.crs {
        h.update(b"crs");
        h.update(crs.to_le_bytes());
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
    rasters: Cache<String, HeldRaster>,
    normalisers: Cache<(String, String), Arc<Normaliser>>,
    raster_hits: AtomicU64,
    raster_misses: AtomicU64,
    normaliser_hits: AtomicU64,
    normaliser_misses: AtomicU64,
    /// The directory `href` links may name files in (`--data-dir`); none: links refused.
    data_dir: Option<PathBuf>,
}

fn weight(bytes: usize) -> u32 {
    u32::try_from(bytes).unwrap_or(u32::MAX).max(1)
}

impl Caches {
    pub fn new(raster_bytes: u64, normaliser_bytes: u64) -> Caches {
        Caches {
            rasters: Cache::builder()
                .max_capacity(raster_bytes)
                .weigher(|k: &String, r: &HeldRaster| weight(r.raster.heap_bytes() + k.len()))
                .build(),
            normalisers: Cache::builder()
                .max_capacity(normaliser_bytes)
                .weigher(|k: &(String, String), n: &Arc<Normaliser>| {
                    weight(n.heap_bytes() + k.1.len() + 128)
                })
                .build(),
            raster_hits: AtomicU64::new(0),
            raster_misses: AtomicU64::new(0),
            normaliser_hits: AtomicU64::new(0),
            normaliser_misses: AtomicU64::new(0),
            data_dir: None,
        }
    }

    /// Lets `href` links name files under `dir` (the operator's `--data-dir`).
    pub fn with_data_dir(mut self, dir: Option<PathBuf>) -> Caches {
        self.data_dir = dir;
        self
    }

    /// A raster by hash, counting the hit or miss.
    pub fn raster(&self, hash: &str) -> Option<HeldRaster> {
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
    pub fn keep_raster(&self, raster: Raster, frame: Frame) -> (String, HeldRaster) {
        let (hash, _, held) = self.keep_raster_for(raster, frame, None);
        (hash, held)
    }

    /// Keeps `raster` for `owner` (an API key's owner id, or everyone when `None`): returns its
    /// hash (the reference clients send), the key it is held under, and the copy held.
    pub fn keep_raster_for(
        &self,
        raster: Raster,
        frame: Frame,
        owner: Option<&str>,
    ) -> (String, String, HeldRaster) {
        let hash = raster_hash(&raster, &frame);
        let key = scoped_key(owner, &hash);
        if let Some(held) = self.raster(&key) {
            return (hash, key, held);
        }
        let held = HeldRaster {
            raster: Arc::new(raster),
            frame,
        };
        self.rasters.insert(key.clone(), held.clone());
        (hash, key, held)
    }

    /// The raster `reference` names for `owner`: another owner's rasters are not found.
    pub fn raster_for(&self, reference: &str, owner: Option<&str>) -> Option<HeldRaster> {
        self.raster(&scoped_key(owner, reference))
    }

    /// This cache as the raster source of one caller.
    pub fn scoped<'a>(&'a self, owner: Option<&'a str>) -> Scoped<'a> {
        Scoped {
            caches: self,
            owner,
        }
    }

    /// The normaliser of (raster, evidence), computed on a miss. Runs on the compute pool.
    pub fn normaliser_of(
        &self,
        hash: &str,
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Arc<Normaliser>, EngineError> {
        let key = (hash.to_string(), evidence.key());
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

impl Caches {
    fn resolve_for(
        &self,
        reference: &str,
        owner: Option<&str>,
    ) -> Result<(String, HeldRaster), DecodeError> {
        if !is_hash(reference) {
            return Err(DecodeError::at(
                "/raster/ref",
                format!("`{reference}` is not a raster reference: it must be `sha256:` and 64 lowercase hex digits, as returned by POST /rasters"),
            ));
        }
        let held = self
            .raster_for(reference, owner)
            .ok_or_else(|| DecodeError {
                pointer: "/raster/ref".into(),
                detail: format!("raster `{reference}` is not held by this service"),
                kind: DecodeKind::UnknownRaster {
                    reference: reference.to_string(),
                },
            })?;
        Ok((scoped_key(owner, reference), held))
    }
}

impl RasterSource for Caches {
    fn resolve(&self, reference: &str) -> Result<(String, HeldRaster), DecodeError> {
        self.resolve_for(reference, None)
    }

    fn keep(&self, raster: Raster, frame: Frame) -> (Option<String>, HeldRaster) {
        let (hash, held) = self.keep_raster(raster, frame);
        (Some(hash), held)
    }

    fn read_file(&self, href: &str, max_bytes: u64) -> Result<Vec<u8>, DecodeError> {
        let Some(dir) = &self.data_dir else {
            return Err(DecodeError::at(
                "/raster/href",
                format!("`{href}` links to a file, but this service reads no files (its operator set no --data-dir): post the raster to /rasters and send its `ref`, or send it inline"),
            ));
        };
        let path = inside(dir, href).ok_or_else(|| {
            DecodeError::at(
                "/raster/href",
                format!("`{href}` is not a file under this service's data directory: give a relative path such as `rasters/valley.tif`, without `..`; nothing is fetched from the network"),
            )
        })?;
        read_bounded(&path, href, max_bytes)
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

/// The key a raster is held under: its hash, prefixed by its owner when API keys are on, so
/// one key's rasters cannot be named by another.
fn scoped_key(owner: Option<&str>, hash: &str) -> String {
    match owner {
        None => hash.to_string(),
        Some(o) => format!("{o}/{hash}"),
    }
}

/// The caches as one caller's raster source: references resolve among that caller's rasters,
/// and rasters kept are kept for it.
pub struct Scoped<'a> {
    caches: &'a Caches,
    owner: Option<&'a str>,
}

impl RasterSource for Scoped<'_> {
    fn resolve(&self, reference: &str) -> Result<(String, HeldRaster), DecodeError> {
        self.caches.resolve_for(reference, self.owner)
    }
    fn keep(&self, raster: Raster, frame: Frame) -> (Option<String>, HeldRaster) {
        let (_, key, held) = self.caches.keep_raster_for(raster, frame, self.owner);
        (Some(key), held)
    }
    fn read_file(&self, href: &str, max_bytes: u64) -> Result<Vec<u8>, DecodeError> {
        self.caches.read_file(href, max_bytes)
    }
}

/// The file `href` names under `dir`, when it is a relative path that resolves inside `dir`.
fn inside(dir: &Path, href: &str) -> Option<PathBuf> {
    use std::path::Component;
    let relative = Path::new(href);
    if href.contains("://")
        || !relative
            .components()
            .all(|c| matches!(c, Component::Normal(_) | Component::CurDir))
    {
        return None;
    }
    let root = dir.canonicalize().ok()?;
    let path = root.join(relative).canonicalize().ok()?;
    path.starts_with(&root).then_some(path)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nodata_spellings_and_signed_zero_hash_alike() {
        let plain = |r: &Raster| raster_hash(r, &Frame::plain(r.width(), r.height()));
        let a = Raster::new(2, 1, vec![Some(0.0), None]).unwrap();
        let b = Raster::new(2, 1, vec![Some(-0.0), None]).unwrap();
        let c = Raster::new(2, 1, vec![Some(0.0), Some(0.5)]).unwrap();
        let d = Raster::new(1, 2, vec![Some(0.0), None]).unwrap();
        assert_eq!(plain(&a), plain(&b));
        assert_ne!(plain(&a), plain(&c));
        assert_ne!(plain(&a), plain(&d), "the shape is part of the hash");
        assert!(is_hash(&plain(&a)));
        assert!(!is_hash("sha256:XYZ"));
    }
}
