//! The duct-profile figure for papers and reports: scala areas (mm²) in one panel, partition
//! width and bony wall (mm) in another, against distance from the base, angle or frequency;
//! flagged sections marked along the bottom. Drawn once as SVG; PNG is that SVG rasterised
//! (resvg, with the bundled Ubuntu font), so both formats show the same figure.

use crate::measure::Row;
use crate::{Error, Result};
use std::fmt::Write as _;
use std::path::Path;

/// The quantity along the horizontal axis.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum XAxis {
    /// Distance from the basal end along the centreline (mm).
    Distance,
    /// Angle from the round window (degrees).
    Angle,
    /// Characteristic frequency (Hz, logarithmic).
    Frequency,
}

impl XAxis {
    /// A row's position on this axis (frequency as log10 Hz).
    pub fn value(self, r: &Row) -> f64 {
        match self {
            XAxis::Distance => r.s_mm,
            XAxis::Angle => r.angle_deg,
            XAxis::Frequency => r.cf_hz.max(1.0).log10(),
        }
    }
    fn title(self) -> &'static str {
        match self {
            XAxis::Distance => "distance from the base s (mm)",
            XAxis::Angle => "angle from the round window (°)",
            XAxis::Frequency => "characteristic frequency (Hz)",
        }
    }
}

/// Colours of the series (colour-blind safe pairs, common practice).
const SV: &str = "#1f77b4";
const ST: &str = "#d62728";
const WIDTH: &str = "#2ca02c";
const WALL: &str = "#9467bd";

/// Round tick steps (1, 2, 5 × 10ⁿ) covering [lo, hi] with about `n` ticks.
fn ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    let raw = (hi - lo).abs().max(1e-12) / n as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0].iter().map(|m| m * mag).find(|s| *s >= raw).unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last).map(|k| k as f64 * step).collect()
}

fn label(v: f64) -> String {
    let s = format!("{v:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" { "0".into() } else { s.to_string() }
}

/// The SVG text of the profile figure (`width` × `height` px at 96 dpi; 900 × 600 reads well at
/// print size).
pub fn profile_svg(rows: &[Row], x: XAxis, title: &str, width: f64, height: f64) -> String {
    let (ml, mr, mt, mb, gap) = (78.0, 150.0, 40.0, 62.0, 36.0);
    let ph = (height - mt - mb - gap) / 2.0;
    let pw = width - ml - mr;
    let xs: Vec<f64> = rows.iter().map(|r| x.value(r)).collect();
    let (x0, x1) = xs.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    let (x0, x1) = if x0 < x1 { (x0, x1) } else { (x0 - 1.0, x0 + 1.0) };
    let sx = |v: f64| ml + (v - x0) / (x1 - x0) * pw;
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" viewBox="0 0 {width} {height}" font-family="Ubuntu, sans-serif">"#
    );
    let _ = writeln!(s, r#"<rect width="100%" height="100%" fill="white"/>"#);
    let _ = writeln!(s, r#"<text x="{ml}" y="24" font-size="16">{}</text>"#, escape(title));
    type Series<'a> = (&'a str, &'a str, Box<dyn Fn(&Row) -> Option<f64>>);
    let panels: [(&str, Vec<Series>); 2] = [
        ("area (mm²)", vec![("scala vestibuli", SV, Box::new(|r: &Row| r.sv.area)), ("scala tympani", ST, Box::new(|r: &Row| r.st.area))]),
        ("length (mm)", vec![("partition width", WIDTH, Box::new(|r: &Row| r.partition_width_mm)), ("bony wall", WALL, Box::new(|r: &Row| r.wall_mm))]),
    ];
    for (k, (ytitle, series)) in panels.iter().enumerate() {
        let top = mt + k as f64 * (ph + gap);
        let vals: Vec<f64> = series.iter().flat_map(|(_, _, f)| rows.iter().filter_map(f)).filter(|v| v.is_finite()).collect();
        let hi = vals.iter().cloned().fold(0.0f64, f64::max);
        let hi = if hi > 0.0 { hi * 1.08 } else { 1.0 };
        let sy = |v: f64| top + ph - v / hi * ph;
        let _ = writeln!(s, r##"<rect x="{ml}" y="{top}" width="{pw}" height="{ph}" fill="none" stroke="#444"/>"##);
        for t in ticks(0.0, hi, 5) {
            let y = sy(t);
            let _ = writeln!(
                s,
                r##"<line x1="{}" y1="{y}" x2="{ml}" y2="{y}" stroke="#444"/><line x1="{ml}" y1="{y}" x2="{}" y2="{y}" stroke="#ddd"/>"##,
                ml - 5.0,
                ml + pw
            );
            let _ = writeln!(s, r#"<text x="{}" y="{}" font-size="12" text-anchor="end">{}</text>"#, ml - 8.0, y + 4.0, label(t));
        }
        let _ = writeln!(
            s,
            r#"<text x="20" y="{}" font-size="13" text-anchor="middle" transform="rotate(-90 20 {})">{ytitle}</text>"#,
            top + ph / 2.0,
            top + ph / 2.0
        );
        for (j, (name, colour, f)) in series.iter().enumerate() {
            // a polyline per run of values (gaps where a row has none)
            let mut run: Vec<String> = vec![];
            let flush = |run: &mut Vec<String>, s: &mut String| {
                if run.len() > 1 {
                    let _ = writeln!(s, r#"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="1.6"/>"#, run.join(" "));
                }
                run.clear();
            };
            for (r, xv) in rows.iter().zip(&xs) {
                match f(r).filter(|v| v.is_finite()) {
                    Some(v) => run.push(format!("{:.2},{:.2}", sx(*xv), sy(v))),
                    None => flush(&mut run, &mut s),
                }
            }
            flush(&mut run, &mut s);
            // legend outside the plot, right of it
            let ly = top + 16.0 + 20.0 * j as f64;
            let lx = ml + pw + 14.0;
            let _ = writeln!(s, r#"<line x1="{lx}" y1="{ly}" x2="{}" y2="{ly}" stroke="{colour}" stroke-width="2.5"/>"#, lx + 22.0);
            let _ = writeln!(s, r#"<text x="{}" y="{}" font-size="12">{name}</text>"#, lx + 28.0, ly + 4.0);
        }
        // flagged sections: short ticks along the bottom of each panel
        for (r, xv) in rows.iter().zip(&xs) {
            if !r.sound() {
                let _ =
                    writeln!(s, r##"<line x1="{0:.2}" y1="{1}" x2="{0:.2}" y2="{2}" stroke="#f0a000" stroke-width="1"/>"##, sx(*xv), top + ph - 7.0, top + ph);
            }
        }
        if k == 0 {
            let ly = top + 16.0 + 20.0 * series.len() as f64;
            let lx = ml + pw + 14.0;
            let _ = writeln!(s, r##"<line x1="{0}" y1="{1}" x2="{0}" y2="{2}" stroke="#f0a000" stroke-width="2"/>"##, lx + 11.0, ly - 6.0, ly + 4.0);
            let _ = writeln!(s, r#"<text x="{}" y="{}" font-size="12">flagged section</text>"#, lx + 28.0, ly + 4.0);
        }
    }
    // x axis along the lower panel
    let bottom = mt + 2.0 * ph + gap;
    let xticks: Vec<(f64, String)> = match x {
        XAxis::Frequency => (0..6)
            .flat_map(|e| [1.0, 2.0, 5.0].map(|m| m * 10f64.powi(e)))
            .filter(|f| (x0..=x1).contains(&f.log10()))
            .map(|f| (f.log10(), if f >= 1000.0 { format!("{}k", label(f / 1000.0)) } else { label(f) }))
            .collect(),
        _ => ticks(x0, x1, 8).into_iter().map(|t| (t, label(t))).collect(),
    };
    for (t, l) in xticks {
        let xv = sx(t);
        for k in 0..2 {
            let b = mt + k as f64 * (ph + gap) + ph;
            let _ = writeln!(s, r##"<line x1="{xv}" y1="{b}" x2="{xv}" y2="{}" stroke="#444"/>"##, b + 5.0);
        }
        let _ = writeln!(s, r#"<text x="{xv}" y="{}" font-size="12" text-anchor="middle">{l}</text>"#, bottom + 19.0);
    }
    let _ = writeln!(s, r#"<text x="{}" y="{}" font-size="13" text-anchor="middle">{}</text>"#, ml + pw / 2.0, bottom + 42.0, x.title());
    s.push_str("</svg>\n");
    s
}

fn escape(t: &str) -> String {
    t.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
}

/// PNG bytes of an SVG, rasterised at `scale` (2 gives 192 dpi for a figure drawn at 96).
pub fn svg_to_png(svg: &str, scale: f32) -> Result<Vec<u8>> {
    use resvg::{tiny_skia, usvg};
    let mut opt = usvg::Options { font_family: "Ubuntu".into(), ..Default::default() };
    opt.fontdb_mut().load_font_data(crate::FIGURE_FONT.to_vec());
    let tree = usvg::Tree::from_str(svg, &opt).map_err(|e| Error::invalid(format!("figure: {e}")))?;
    let size = tree.size().to_int_size().scale_by(scale).ok_or_else(|| Error::invalid("figure: empty size"))?;
    let mut pix = tiny_skia::Pixmap::new(size.width(), size.height()).ok_or_else(|| Error::invalid("figure: empty size"))?;
    resvg::render(&tree, tiny_skia::Transform::from_scale(scale, scale), &mut pix.as_mut());
    pix.encode_png().map_err(|e| Error::invalid(format!("figure: {e}")))
}

/// Writes the profile figure to `path`: SVG or PNG by its extension.
pub fn write(rows: &[Row], x: XAxis, title: &str, path: &Path) -> Result<()> {
    let svg = profile_svg(rows, x, title, 900.0, 600.0);
    let ext = path.extension().map(|e| e.to_string_lossy().to_lowercase()).unwrap_or_default();
    let bytes = match ext.as_str() {
        "svg" => svg.into_bytes(),
        "png" => svg_to_png(&svg, 2.0)?,
        _ => return Err(Error::invalid(format!("{}: a figure is written as .svg or .png", path.display()))),
    };
    crate::project::write_atomic(path, &bytes)
}
