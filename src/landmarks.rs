//! Landmarks: the five kinds, the CSV file (`kind,x_mm,y_mm,z_mm`, stack-frame mm) and edits with
//! undo/redo.

use crate::frame::{Frame, Handedness};
use crate::stack::Stack;
use crate::{Error, Result};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// The landmark kinds; `as_str` gives the file and UI word.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    /// A point on the modiolar axis near the base.
    AxisBase,
    /// A point on the modiolar axis near the apex.
    AxisApex,
    /// Round-window centre: the 0° direction.
    Window,
    /// Inner edge of the partition (tip of the bony spiral shelf).
    Lamina,
    /// Outer edge of the partition, where it meets the lateral wall.
    Ligament,
}

impl Kind {
    pub const ALL: [Kind; 5] = [Kind::AxisBase, Kind::AxisApex, Kind::Window, Kind::Lamina, Kind::Ligament];
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::AxisBase => "axis_base",
            Kind::AxisApex => "axis_apex",
            Kind::Window => "window",
            Kind::Lamina => "lamina",
            Kind::Ligament => "ligament",
        }
    }
    pub fn parse(s: &str) -> Option<Kind> {
        Kind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

/// One landmark in stack-frame mm.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Landmark {
    pub kind: Kind,
    pub p: [f64; 3],
}

/// Parses landmark CSV text. `path` names the file in errors; a stack, when given, bounds the points.
pub fn parse_csv(text: &str, path: &Path, stack: Option<&Stack>) -> Result<Vec<Landmark>> {
    let mut lines = text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty());
    let (_, header) = lines.next().ok_or_else(|| Error::format(path, "empty landmark file"))?;
    let cols: Vec<String> = header.split(',').map(|c| c.trim().trim_start_matches('\u{feff}').to_string()).collect();
    let want = ["kind", "x_mm", "y_mm", "z_mm"];
    let idx: Vec<usize> = want
        .iter()
        .map(|w| cols.iter().position(|c| c == w).ok_or_else(|| Error::line(path, 1, format!("missing column '{w}'; the header must be kind,x_mm,y_mm,z_mm"))))
        .collect::<Result<_>>()?;
    let mut out = vec![];
    for (i, line) in lines {
        let n = i + 1;
        let f: Vec<&str> = line.split(',').map(|c| c.trim()).collect();
        if f.len() < cols.len() {
            return Err(Error::line(path, n, format!("{} fields, the header has {}", f.len(), cols.len())));
        }
        let kind = Kind::parse(f[idx[0]])
            .ok_or_else(|| Error::line(path, n, format!("unknown kind '{}'; kinds are axis_base, axis_apex, window, lamina, ligament", f[idx[0]])))?;
        let mut p = [0.0; 3];
        for a in 0..3 {
            let s = f[idx[a + 1]];
            p[a] = s
                .parse::<f64>()
                .ok()
                .filter(|x| x.is_finite())
                .ok_or_else(|| Error::line(path, n, format!("'{s}' in column {} is not a number", want[a + 1])))?;
        }
        if let Some(st) = stack
            && st.voxel.is_some()
            && !st.contains_mm(p)
        {
            return Err(Error::line(path, n, format!("point ({:.3}, {:.3}, {:.3}) mm lies outside the stack", p[0], p[1], p[2])));
        }
        out.push(Landmark { kind, p });
    }
    Ok(out)
}

/// Landmarks given in the stack file's world frame (`stack.world`: NIfTI RAS, NRRD its space,
/// MetaImage LPS), mapped into the stack frame through the file's index-to-world transform.
/// `source` names the landmark file in errors: a stack with no such transform, or a landmark that
/// maps outside the stack (the frame it was read in is named).
pub fn from_world(items: &[Landmark], stack: &Stack, source: &Path) -> Result<Vec<Landmark>> {
    let w = stack
        .world
        .as_ref()
        .ok_or_else(|| Error::invalid(format!("{}: the file has no index-to-world transform; world-frame landmarks need one", stack.path.display())))?;
    let mm = stack.voxel()?.original_mm;
    let mut out = Vec::with_capacity(items.len());
    for (i, l) in items.iter().enumerate() {
        let p = w.to_stack(l.p, mm).ok_or_else(|| Error::invalid(format!("{}: its index-to-world matrix is singular", stack.path.display())))?;
        if !stack.contains_mm(p) {
            return Err(Error::invalid(format!(
                "{}: landmark #{} ({}) maps to ({:.3}, {:.3}, {:.3}) mm in the stack frame, outside the stack (is the world frame {}?)",
                source.display(),
                i + 1,
                l.kind.as_str(),
                p[0],
                p[1],
                p[2],
                w.frame
            )));
        }
        out.push(Landmark { p, ..*l });
    }
    Ok(out)
}

/// The first landmark (index, landmark) lying outside the stack, if any.
pub fn first_outside(items: &[Landmark], stack: &Stack) -> Option<(usize, Landmark)> {
    items.iter().enumerate().find(|(_, l)| !stack.contains_mm(l.p)).map(|(i, l)| (i, *l))
}

/// Reads a landmark CSV file.
pub fn read_csv(path: &Path, stack: Option<&Stack>) -> Result<Vec<Landmark>> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    let text = String::from_utf8(bytes).map_err(|_| Error::format(path, "not UTF-8 text"))?;
    parse_csv(&text, path, stack)
}

/// CSV text of landmarks (full f64 precision, round-trips exactly).
pub fn to_csv(items: &[Landmark]) -> String {
    let mut s = String::from("kind,x_mm,y_mm,z_mm\n");
    for l in items {
        s.push_str(&format!("{},{},{},{}\n", l.kind.as_str(), l.p[0], l.p[1], l.p[2]));
    }
    s
}

/// Writes landmarks atomically.
pub fn write_csv(path: &Path, items: &[Landmark]) -> Result<()> {
    crate::project::write_atomic(path, to_csv(items).as_bytes())
}

/// The single landmark of a kind; errors when there is none or more than one.
pub fn single(items: &[Landmark], kind: Kind) -> Result<[f64; 3]> {
    let found: Vec<&Landmark> = items.iter().filter(|l| l.kind == kind).collect();
    match found.len() {
        1 => Ok(found[0].p),
        0 => Err(Error::invalid(format!("no {} landmark: the cochlear frame needs one", kind.as_str()))),
        n => Err(Error::invalid(format!("{n} {} landmarks: keep exactly one", kind.as_str()))),
    }
}

/// The cochlear frame from the axis and window landmarks, with the handedness detected from the
/// partition landmarks.
pub fn frame_from(items: &[Landmark]) -> Result<Frame> {
    let (b, a, w) = (single(items, Kind::AxisBase)?, single(items, Kind::AxisApex)?, single(items, Kind::Window)?);
    let right = Frame::new(b, a, w, Handedness::Right)?;
    let of = |k: Kind| -> Vec<[f64; 3]> { items.iter().filter(|l| l.kind == k).map(|l| l.p).collect() };
    let handed = crate::spiral::handedness(&right, &of(Kind::Lamina), &of(Kind::Ligament));
    Frame::new(b, a, w, handed)
}

/// One reversible change to a landmark list.
///
/// ```
/// use ductline::landmarks::{Edit, Kind, Landmark, LandmarkSet};
/// let mut set = LandmarkSet::default();
/// let lm = |x: f64| Landmark { kind: Kind::Lamina, p: [x, 0.0, 0.0] };
/// // a group (an import, or a trace's proposals) is one step
/// set.apply(Edit::Group(vec![Edit::Insert { index: 0, lm: lm(1.0) }, Edit::Insert { index: 1, lm: lm(2.0) }])).unwrap();
/// assert_eq!(set.items.len(), 2);
/// assert!(set.undo() && set.items.is_empty());
/// assert!(set.redo() && set.items.len() == 2);
/// // all or nothing: a bad index rolls back what the group had done
/// assert!(set.apply(Edit::Group(vec![Edit::Delete { index: 0 }, Edit::Delete { index: 7 }])).is_err());
/// assert_eq!(set.items.len(), 2);
/// ```
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Edit {
    Insert {
        index: usize,
        lm: Landmark,
    },
    Delete {
        index: usize,
    },
    Move {
        index: usize,
        to: [f64; 3],
    },
    SetKind {
        index: usize,
        kind: Kind,
    },
    /// Several edits as one step (undone together), applied in order.
    Group(Vec<Edit>),
}

/// A landmark list with an undo/redo history: every change goes through [`LandmarkSet::apply`].
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct LandmarkSet {
    pub items: Vec<Landmark>,
    #[serde(skip)]
    undo: Vec<Edit>,
    #[serde(skip)]
    redo: Vec<Edit>,
}

impl LandmarkSet {
    pub fn new(items: Vec<Landmark>) -> Self {
        LandmarkSet { items, undo: vec![], redo: vec![] }
    }

    /// Applies an edit, records its inverse for undo and clears redo. Errors on a bad index.
    pub fn apply(&mut self, e: Edit) -> Result<()> {
        let inv = self.raw(e)?;
        self.undo.push(inv);
        self.redo.clear();
        Ok(())
    }

    /// Adds landmarks at the end as one step (one undo takes them all back).
    pub fn append(&mut self, lms: Vec<Landmark>) -> Result<()> {
        let at = self.items.len();
        self.apply(Edit::Group(lms.into_iter().enumerate().map(|(k, lm)| Edit::Insert { index: at + k, lm }).collect()))
    }

    pub fn undo(&mut self) -> bool {
        let Some(e) = self.undo.pop() else { return false };
        match self.raw(e) {
            Ok(inv) => {
                self.redo.push(inv);
                true
            }
            Err(_) => false,
        }
    }

    pub fn redo(&mut self) -> bool {
        let Some(e) = self.redo.pop() else { return false };
        match self.raw(e) {
            Ok(inv) => {
                self.undo.push(inv);
                true
            }
            Err(_) => false,
        }
    }

    pub fn can_undo(&self) -> bool {
        !self.undo.is_empty()
    }
    pub fn can_redo(&self) -> bool {
        !self.redo.is_empty()
    }

    /// Applies without touching the history; returns the inverse edit.
    fn raw(&mut self, e: Edit) -> Result<Edit> {
        let bad = |i: usize| Error::invalid(format!("no landmark #{i}"));
        Ok(match e {
            Edit::Insert { index, lm } => {
                if index > self.items.len() {
                    return Err(bad(index));
                }
                self.items.insert(index, lm);
                Edit::Delete { index }
            }
            Edit::Delete { index } => {
                if index >= self.items.len() {
                    return Err(bad(index));
                }
                let lm = self.items.remove(index);
                Edit::Insert { index, lm }
            }
            Edit::Move { index, to } => {
                let l = self.items.get_mut(index).ok_or_else(|| bad(index))?;
                let from = l.p;
                l.p = to;
                Edit::Move { index, to: from }
            }
            Edit::SetKind { index, kind } => {
                let l = self.items.get_mut(index).ok_or_else(|| bad(index))?;
                let old = l.kind;
                l.kind = kind;
                Edit::SetKind { index, kind: old }
            }
            Edit::Group(edits) => {
                let mut inv = Vec::with_capacity(edits.len());
                for e in edits {
                    match self.raw(e) {
                        Ok(i) => inv.push(i),
                        Err(err) => {
                            // all or nothing: the applied part is rolled back
                            for i in inv.into_iter().rev() {
                                let _ = self.raw(i);
                            }
                            return Err(err);
                        }
                    }
                }
                inv.reverse();
                Edit::Group(inv)
            }
        })
    }
}
