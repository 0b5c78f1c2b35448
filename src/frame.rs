//! The cochlear frame: cylindrical coordinates (radius, angle, height) about the modiolar axis.
//!
//! Consensus convention (Verbist et al. 2010): height along the modiolar axis toward the apex,
//! angle 0° toward the round window, angles growing from base to apex for left and right ears
//! alike. The origin is the foot of the round-window landmark on the axis, so height 0 is the
//! window's level. Lengths in mm, angles in degrees unless a name says radians.

use crate::{Error, Result};
use serde::{Deserialize, Serialize};

/// Small 3-vector helpers (mm).
pub mod v3 {
    pub type V = [f64; 3];
    #[inline]
    pub fn add(a: V, b: V) -> V {
        [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
    }
    #[inline]
    pub fn sub(a: V, b: V) -> V {
        [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
    }
    #[inline]
    pub fn scale(a: V, s: f64) -> V {
        [a[0] * s, a[1] * s, a[2] * s]
    }
    #[inline]
    pub fn dot(a: V, b: V) -> f64 {
        a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
    }
    #[inline]
    pub fn cross(a: V, b: V) -> V {
        [a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]]
    }
    #[inline]
    pub fn norm(a: V) -> f64 {
        dot(a, a).sqrt()
    }
    /// a/|a|; a zero vector stays zero.
    #[inline]
    pub fn unit(a: V) -> V {
        let n = norm(a);
        if n > 0.0 { scale(a, 1.0 / n) } else { a }
    }
    /// a + s·b
    #[inline]
    pub fn axpy(a: V, s: f64, b: V) -> V {
        [a[0] + s * b[0], a[1] + s * b[1], a[2] + s * b[2]]
    }
    pub fn dist(a: V, b: V) -> f64 {
        norm(sub(a, b))
    }
}
use v3::V;

/// Which way the spiral turns seen from the apex along the axis; angles grow base → apex for both.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Handedness {
    /// Counter-clockwise about +height in the frame's right-handed axes.
    Right,
    /// Clockwise (a mirrored specimen, e.g. the other ear).
    Left,
}

/// The cochlear frame in stack millimetres.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Frame {
    /// Origin on the modiolar axis (mm, stack frame): the foot of the window landmark.
    pub origin: V,
    /// Unit vector along the axis toward the apex.
    pub ez: V,
    /// Unit vector toward the round window (angle 0), perpendicular to `ez`.
    pub ex: V,
    /// ez × ex.
    pub ey: V,
    pub handed: Handedness,
}

impl Frame {
    /// Builds the frame from two axis points (base, apex) and the round-window centre.
    /// Errors when the axis points coincide or the window lies on the axis.
    ///
    /// ```
    /// use ductline::frame::{Frame, Handedness};
    /// // axis along +z through (5, 5), round window toward +x
    /// let f = Frame::new([5.0, 5.0, 0.0], [5.0, 5.0, 4.0], [8.0, 5.0, 1.0], Handedness::Right).unwrap();
    /// let [r, angle, height] = f.to_cochlear([5.0, 7.0, 2.0]);
    /// assert!((r - 2.0).abs() < 1e-12 && (angle - 90.0).abs() < 1e-12 && (height - 1.0).abs() < 1e-12);
    /// // a left ear: the same point lies at −90°, its angles grow the other way round
    /// let l = Frame::new([5.0, 5.0, 0.0], [5.0, 5.0, 4.0], [8.0, 5.0, 1.0], Handedness::Left).unwrap();
    /// assert!((l.to_cochlear([5.0, 7.0, 2.0])[1] + 90.0).abs() < 1e-12);
    /// ```
    pub fn new(axis_base: V, axis_apex: V, window: V, handed: Handedness) -> Result<Frame> {
        let axis = v3::sub(axis_apex, axis_base);
        if v3::norm(axis) < 1e-9 {
            return Err(Error::invalid("axis_base and axis_apex coincide: the modiolar axis is undefined"));
        }
        let ez = v3::unit(axis);
        let w = v3::sub(window, axis_base);
        let along = v3::dot(w, ez);
        let origin = v3::axpy(axis_base, along, ez);
        let radial = v3::sub(window, origin);
        if v3::norm(radial) < 1e-6 {
            return Err(Error::invalid("the window landmark lies on the modiolar axis: angle 0 is undefined"));
        }
        let ex = v3::unit(radial);
        let ey = v3::cross(ez, ex);
        Ok(Frame { origin, ez, ex, ey, handed })
    }

    fn sign(&self) -> f64 {
        match self.handed {
            Handedness::Right => 1.0,
            Handedness::Left => -1.0,
        }
    }

    /// Stack mm → (radius mm, angle degrees in (−180, 180], height mm).
    pub fn to_cochlear(&self, p: V) -> [f64; 3] {
        let d = v3::sub(p, self.origin);
        let x = v3::dot(d, self.ex);
        let y = v3::dot(d, self.ey) * self.sign();
        [x.hypot(y), y.atan2(x).to_degrees(), v3::dot(d, self.ez)]
    }

    /// (radius mm, angle degrees, height mm) → stack mm. Any angle, wrapped or not.
    pub fn to_stack(&self, r: f64, angle_deg: f64, h: f64) -> V {
        let t = angle_deg.to_radians();
        self.from_local([r * t.cos(), r * t.sin(), h])
    }

    /// Frame-local Cartesian (x toward the window, y toward growing angle, z = height) → stack mm.
    pub fn from_local(&self, l: V) -> V {
        let p = v3::axpy(self.origin, l[0], self.ex);
        let p = v3::axpy(p, l[1] * self.sign(), self.ey);
        v3::axpy(p, l[2], self.ez)
    }

    /// A local direction (no origin) → stack direction.
    pub fn dir_to_stack(&self, l: V) -> V {
        v3::add(v3::add(v3::scale(self.ex, l[0]), v3::scale(self.ey, l[1] * self.sign())), v3::scale(self.ez, l[2]))
    }

    /// The radial plane through the axis at `angle_deg`: (origin, unit radial direction, unit axis).
    /// A point at (u, w) in the plane is origin + u·radial + w·axis (u > 0 on the `angle_deg` side).
    pub fn radial_plane(&self, angle_deg: f64) -> (V, V, V) {
        let t = angle_deg.to_radians();
        (self.origin, self.dir_to_stack([t.cos(), t.sin(), 0.0]), self.ez)
    }
}

/// Wraps an angle in degrees into (−180, 180].
pub fn wrap180(a: f64) -> f64 {
    let mut x = a % 360.0;
    if x <= -180.0 {
        x += 360.0;
    } else if x > 180.0 {
        x -= 360.0;
    }
    x
}
