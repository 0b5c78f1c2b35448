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
    /// Published length estimates from the basal diameter A, or why A is not known.
    pub estimates: std::result::Result<LengthEstimates, String>,
}

impl Outcome {
    pub fn flagged_sections(&self) -> usize {
        self.rows.iter().filter(|r| !r.sound()).count()
    }
    /// The one-paragraph summary printed by the command line and shown in the app: depth, turns
    /// and handedness as detected, then the basal diameter and the published estimates with the
    /// depth each refers to.
    pub fn summary(&self) -> String {
        let cl = &self.centreline;
        let depth = cl.depth_deg();
        let hand = match cl.frame.handed {
            crate::frame::Handedness::Right => "right-handed",
            crate::frame::Handedness::Left => "left-handed",
        };
        let mut s = format!(
            "length {:.2} mm over {:.0}° ({:.2} turns, {} spiral, {:.0}° to {:.0}°), {} sections, {} flagged",
            cl.length,
            depth,
            depth / 360.0,
            hand,
            cl.t0.to_degrees(),
            cl.t1.to_degrees(),
            self.rows.len(),
            self.flagged_sections()
        );
        match &self.estimates {
            Ok(e) => s.push_str(&format!(
                "; basal diameter A {:.2} mm; published estimates: Escudé 2006 {:.2} mm (lateral wall, to the traced {:.0}°), \
                 Alexiades 2015 {:.2} mm (organ of Corti) / {:.2} mm (lateral wall), both for the full cochlea",
                e.basal_diameter_mm, e.escude_lw_mm, depth, e.alexiades_oc_mm, e.alexiades_lw_mm
            )),
            Err(why) => s.push_str(&format!("; basal diameter A not given: {why}")),
        }
        s
    }
}

/// Fits the centreline only (fast; the app calls it on every landmark edit). `voxel_mm`: the
/// stack's largest voxel side (0 when unknown), the smallest misfit reported as an outlier.
pub fn fit(items: &[Landmark], fit: &FitSettings, voxel_mm: f64) -> Result<Centreline> {
    let frame = landmarks::frame_from(items)?;
    Centreline::fit_at(&frame, items, fit, voxel_mm)
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
    let voxel = stack.voxel()?;
    let centreline = fit(items, fit_s, voxel.max())?;
    measure_fitted(stack, centreline, ms, overrides, gw, progress)
}

/// Measures along a centreline already fitted (the app's, after an edit: no second fit).
pub fn measure_fitted(
    stack: &Stack,
    centreline: Centreline,
    ms: &MeasureSettings,
    overrides: &[Override],
    gw: &Greenwood,
    progress: &Progress,
) -> Result<Outcome> {
    let (geoms, rows) = measure::measure(stack, &centreline, ms, overrides, gw, progress)?;
    let estimates = centreline.basal_diameter().map(|a| LengthEstimates::new(a, centreline.depth_deg()));
    Ok(Outcome { centreline, geoms, rows, greenwood: gw.clone(), estimates })
}

/// One line per landmark the fit down-weighted or could not place on one turn, numbered as in the
/// landmark list (1 = first row after the header).
pub fn fit_warnings(cl: &Centreline, items: &[Landmark]) -> Vec<String> {
    let mut out = vec![];
    for (i, t, r) in cl.flagged() {
        out.push(format!(
            "landmark #{} ({}) at {:.0}° lies {:.3} mm from the fitted curve (limit {:.3} mm): left out of the fit, kept in the file",
            i + 1,
            items[i].kind.as_str(),
            t.to_degrees(),
            r,
            if items[i].kind == crate::landmarks::Kind::Lamina { cl.lamina.limit_mm } else { cl.ligament.limit_mm }
        ));
    }
    for &(i, t, alt) in &cl.ambiguous {
        out.push(format!(
            "landmark #{} ({}) placed at {:.0}° could belong to the turn at {:.0}°: check it",
            i + 1,
            items[i].kind.as_str(),
            t.to_degrees(),
            alt.to_degrees()
        ));
    }
    out
}
