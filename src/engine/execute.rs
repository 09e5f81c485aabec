//! Executes a plan (temporary: per-zone naive reference while the tree executor lands).

use super::control::Control;
use super::error::EngineError;
use super::model::{Raster, Settings, Zone};
use super::normaliser::Normaliser;
use super::plan::Plan;
use super::summary::{summarise, ZoneSummary};

/// Posterior event probabilities of single cells.
#[derive(Clone, Debug, PartialEq)]
pub struct CellPosterior {
    /// (cell, prior p, posterior P(event | total)) for each requested cell, in request order.
    pub cells: Vec<(u32, f64, f64)>,
    /// Largest certified error bound over the cells.
    pub error_bound: f64,
}

pub fn execute(
    _plan: &Plan,
    raster: &Raster,
    zones: &[Zone],
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
) -> Result<Vec<ZoneSummary>, EngineError> {
    let mut out = Vec::with_capacity(zones.len());
    for z in zones {
        control.check()?;
        let pmf = super::reference::conditional_pmf(raster, z.cells(), normaliser.total())
            .ok_or_else(|| EngineError::ImpossibleTotal("impossible total".into()))?;
        out.push(summary_of(raster, z, 0, pmf, settings, 0.0));
    }
    Ok(out)
}

pub(crate) fn summary_of(raster: &Raster, z: &Zone, offset: u64, pmf: Vec<f64>, settings: &Settings, bound: f64) -> ZoneSummary {
    let (mean, sd, mode, median, interval, exceedance) = summarise(offset, &pmf, settings.level, &settings.thresholds);
    let (mut pm, mut pv) = (0.0, 0.0);
    for &c in z.cells() {
        let p = raster.values()[c as usize];
        pm += p;
        pv += p * (1.0 - p);
    }
    ZoneSummary {
        id: z.id().to_string(),
        cells: z.len(),
        offset,
        pmf: if settings.pmf { pmf } else { Vec::new() },
        mean,
        sd,
        mode,
        median,
        interval,
        exceedance,
        prior_mean: pm,
        prior_sd: pv.sqrt(),
        error_bound: bound,
    }
}

pub fn cell_posterior(
    raster: &Raster,
    cells: Option<&[u32]>,
    normaliser: &Normaliser,
    _settings: &Settings,
    control: &Control,
) -> Result<CellPosterior, EngineError> {
    let list: Vec<u32> = match cells {
        Some(c) => c.to_vec(),
        None => (0..raster.len() as u32).filter(|&c| !raster.values()[c as usize].is_nan()).collect(),
    };
    let mut out = Vec::with_capacity(list.len());
    for c in list {
        control.check()?;
        let pmf = super::reference::conditional_pmf(raster, &[c], normaliser.total())
            .ok_or_else(|| EngineError::ImpossibleTotal("impossible total".into()))?;
        out.push((c, raster.values()[c as usize], pmf.get(1).copied().unwrap_or(0.0)));
    }
    Ok(CellPosterior { cells: out, error_bound: 0.0 })
}
