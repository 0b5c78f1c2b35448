//! Published relations of the trade: the Greenwood frequency–position map with species presets,
//! and cochlear length estimates from the basal diameter. Sources in shared REFERENCES and beside
//! each constant.

use crate::{Error, Result};
use serde::{Deserialize, Serialize};

/// Greenwood (1990) map F = A·(10^(a·x) − k), x = fraction of length from the apex (0 apex, 1 base).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Greenwood {
    pub species: String,
    /// Hz
    pub big_a: f64,
    pub a: f64,
    pub k: f64,
}

impl Greenwood {
    /// Characteristic frequency (Hz) at fraction `x` of the length from the apex.
    pub fn cf(&self, x: f64) -> f64 {
        self.big_a * (10f64.powf(self.a * x) - self.k)
    }

    /// The preset for a species name (case and separators ignored), e.g. "human", "guinea-pig".
    pub fn preset(name: &str) -> Result<Greenwood> {
        let key: String = name.to_ascii_lowercase().chars().filter(|c| c.is_ascii_alphanumeric()).collect();
        let (a_big, a, k) = match key.as_str() {
            // Greenwood 1990, human
            "human" => (165.4, 2.1, 0.88),
            // Greenwood 1990 / Liberman 1982
            "cat" => (456.0, 2.1, 0.8),
            "guineapig" => (350.0, 2.1, 0.85),
            "chinchilla" => (163.5, 2.1, 0.85),
            "macaque" | "monkey" => (360.0, 2.1, 0.85),
            // Müller 1996
            "gerbil" => (398.0, 2.2, 0.631),
            // fit after Müller et al. 2005
            "mouse" => (9800.0, 0.92, 0.68),
            _ => return Err(Error::invalid(format!("unknown species '{name}'; known: {}", SPECIES.join(", ")))),
        };
        Ok(Greenwood { species: canonical(&key).to_string(), big_a: a_big, a, k })
    }
}

/// Species with presets, as the command line and app spell them.
pub const SPECIES: [&str; 7] = ["human", "cat", "guinea-pig", "chinchilla", "macaque", "gerbil", "mouse"];

fn canonical(key: &str) -> &'static str {
    match key {
        "guineapig" => "guinea-pig",
        "monkey" => "macaque",
        k => SPECIES.iter().find(|s| **s == k).copied().unwrap_or("custom"),
    }
}

/// Published length estimates (mm) from the basal diameter `a_mm` and the angular depth `depth_deg`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LengthEstimates {
    pub basal_diameter_mm: f64,
    /// Escudé et al. 2006: 2.62·A·ln(1 + θ/235), lateral wall, at the traced angular depth.
    pub escude_lw_mm: f64,
    /// Alexiades et al. 2015: 4.16·A − 4 (organ of Corti).
    pub alexiades_oc_mm: f64,
    /// Alexiades et al. 2015: 4.16·A − 2.7 (lateral wall).
    pub alexiades_lw_mm: f64,
}

impl LengthEstimates {
    pub fn new(a_mm: f64, depth_deg: f64) -> Self {
        LengthEstimates {
            basal_diameter_mm: a_mm,
            escude_lw_mm: escude(a_mm, depth_deg),
            alexiades_oc_mm: 4.16 * a_mm - 4.0,
            alexiades_lw_mm: 4.16 * a_mm - 2.7,
        }
    }
}

/// Escudé et al. 2006 lateral-wall length (mm) to angle `theta_deg` for basal diameter `a_mm`.
///
/// ```
/// // REFERENCES.md: A = 9 mm, two full turns (720°) → 33.06 mm
/// let l = ductline::cochlea::escude(9.0, 720.0);
/// assert!((l - 33.06).abs() < 0.01);
/// ```
pub fn escude(a_mm: f64, theta_deg: f64) -> f64 {
    2.62 * a_mm * (1.0 + theta_deg / 235.0).ln()
}
