//! ductline: cochlear duct geometry from micro-CT stacks.
//!
//! The pipeline reads top to bottom, one module a step:
//! [`stack`] (voxels) → [`frame`] (cochlear coordinates) → [`landmarks`] → [`spiral`] (turns)
//! → [`centreline`]
//! → [`section`] (resampled planes) → [`measure`] (areas, width, wall) → [`export`] (tables, STL).
//! [`project`] keeps all of it in one file; [`phantom`] writes synthetic stacks with known truth.
//! The library never touches the GUI; `src/app/` is the only place that does.
//!
//! Units everywhere: millimetres, degrees, mm², Hz.

// Comparisons are written `!(a > b)` on purpose where a NaN must fail them.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod centreline;
pub mod cochlea;
pub mod display;
pub mod error;
pub mod export;
pub mod figure;
pub mod frame;
pub mod landmarks;
pub mod measure;
pub mod phantom;
pub mod pipeline;
pub mod progress;
pub mod project;
pub mod section;
pub mod spiral;
pub mod spline;
pub mod stack;
pub mod trace;
pub mod vtk;

pub use error::{Error, Result};

/// Tool version, written into every exported table.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// The research-use caution shown in the README, the app and every JSON export.
pub const CAUTION: &str = "ductline is a research tool, not a medical device. Its measurements must not \
drive clinical decisions; defer to licensed practice and local regulations.";

/// The font figures are drawn with (Ubuntu Light, Ubuntu Font Licence; egui's former default).
pub const FIGURE_FONT: &[u8] = emoji_fonts::UBUNTU_LIGHT;
