//! The whole job in one call: landmarks → frame → centreline → sections → measures.
//! Used by the command line and by the app's background worker.

use crate::Result;
use crate::centreline::{Centreline, FitSettings};
use crate::cochlea::{Greenwood, LengthEstimates};
use crate::landmarks::{self, Landmark};
use crate::measure::{self, MeasureSettings, Override, Row};
use crate::progress::Progress;
use crate::section::SectionGeom;
use crate::stack::Stack;

/// Everything a measurement run produces.
#[derive(Clone, Debug)]
pub struct Outcome {
    pub centreline: Centreline,
    pub geoms: Vec<SectionGeom>,
    pub rows: Vec<Row>,
    pub greenwood: Greenwood,
    pub estimates: LengthEstimates,
}

impl Outcome {
    pub fn flagged_sections(&self) -> usize {
        self.rows.iter().filter(|r| !r.sound()).count()
    }
    /// The one-paragraph summary printed by the command line and shown in the app.
    pub fn summary(&self) -> String {
        let cl = &self.centreline;
        let e = &self.estimates;
        format!(
            "length {:.2} mm over {:.0}° ({:.2} turns), {} sections, {} flagged; basal diameter A {:.2} mm; \
             published estimates: Escudé 2006 {:.2} mm (lateral wall, at this depth), Alexiades 2015 {:.2} mm (organ of Corti) / {:.2} mm (lateral wall)",
            cl.length,
            cl.depth_deg(),
            cl.depth_deg() / 360.0,
            self.rows.len(),
            self.flagged_sections(),
            e.basal_diameter_mm,
            e.escude_lw_mm,
            e.alexiades_oc_mm,
            e.alexiades_lw_mm
        )
    }
}

/// Fits the centreline only (fast; the app calls it on every landmark edit).
pub fn fit(items: &[Landmark], fit: &FitSettings) -> Result<Centreline> {
    let frame = landmarks::frame_from(items)?;
    Centreline::fit(&frame, items, fit)
}

/// Fits and measures.
pub fn run(
    stack: &Stack,
    items: &[Landmark],
    fit_s: &FitSettings,
    ms: &MeasureSettings,
    overrides: &[Override],
    gw: &Greenwood,
    progress: &Progress,
) -> Result<Outcome> {
    stack.voxel()?;
    let centreline = fit(items, fit_s)?;
    let (geoms, rows) = measure::measure(stack, &centreline, ms, overrides, gw, progress)?;
    let estimates = LengthEstimates::new(centreline.basal_diameter(), centreline.depth_deg());
    Ok(Outcome { centreline, geoms, rows, greenwood: gw.clone(), estimates })
}
