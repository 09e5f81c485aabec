//! What is known about the number of events over the raster, checked once against the raster.
//!
//! Today the one form is an exact observed total. An `Evidence` can only be built valid for its
//! raster (`Evidence::exact_total` refuses a total the raster cannot produce), so the normaliser
//! and everything after it trust it. New forms of evidence (a range, imperfect detection, totals
//! per stratum) belong here, each with its own checked constructor.

use super::error::{EngineError, ImpossibleTotal};
use super::model::Raster;

#[derive(Clone, Debug, PartialEq)]
pub struct Evidence {
    form: Form,
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum Form {
    /// Exactly this many events happened over the valid cells.
    Total(u64),
}

impl Evidence {
    /// An exact observed total over all valid cells of `raster`.
    ///
    /// Occurs as `ImpossibleTotal` when the total is below the number of cells with p = 1 or
    /// above the number with p > 0.
    pub fn exact_total(total: u64, raster: &Raster) -> Result<Evidence, EngineError> {
        let s = raster.stats();
        let possible = s.certain + s.free;
        if total < s.certain || total > possible {
            return Err(EngineError::ImpossibleTotal(ImpossibleTotal {
                total,
                certain: s.certain,
                possible,
            }));
        }
        Ok(Evidence {
            form: Form::Total(total),
        })
    }

    /// The observed total.
    pub fn total(&self) -> u64 {
        match self.form {
            Form::Total(m) => m,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn totals_outside_the_raster_s_range_are_refused() {
        // Two certain cells, one impossible (p = 0), two free: totals 2 ..= 4 can happen.
        let r = Raster::new(
            5,
            1,
            vec![Some(1.0), Some(1.0), Some(0.0), Some(0.5), Some(0.2)],
        )
        .unwrap();
        for m in [0, 1, 5] {
            assert!(matches!(
                Evidence::exact_total(m, &r),
                Err(EngineError::ImpossibleTotal(ImpossibleTotal {
                    certain: 2,
                    possible: 4,
                    ..
                }))
            ));
        }
        for m in 2..=4 {
            assert_eq!(Evidence::exact_total(m, &r).unwrap().total(), m);
        }
    }
}
