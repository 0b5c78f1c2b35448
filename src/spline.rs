//! Cubic smoothing spline (Reinsch form, after Green & Silverman 1994) with the smoothing chosen by
//! generalized cross-validation (Craven & Wahba 1979) or given by the user.
//!
//! Minimises Σ wᵢ (yᵢ − g(xᵢ))² + λ ∫ g''(x)² dx over natural cubic splines g. With knot spacings
//! hᵢ, the banded matrices Q (n×(n−2)) and R ((n−2)×(n−2)) and W = diag(w) give the second
//! derivatives γ at the interior knots from (R + λ QᵀW⁻¹Q) γ = Qᵀy and the fitted values
//! g = y − λ W⁻¹Q γ. Outside the knots the spline continues as a straight line (natural end
//! conditions). The hat matrix A (g = A y) has diagonal Aᵢᵢ = 1 − (λ/wᵢ)·qᵢᵀ M⁻¹ qᵢ with qᵢ the
//! i-th row of Q and M = R + λ QᵀW⁻¹Q; leave-one-out residuals are (yᵢ − gᵢ)/(1 − Aᵢᵢ).

use crate::{Error, Result};

/// A fitted natural cubic spline: knots, values and second derivatives at the knots.
#[derive(Clone, Debug)]
pub struct SmoothSpline {
    x: Vec<f64>,
    g: Vec<f64>,
    gamma: Vec<f64>,
    /// The smoothing parameter used (units of y²/x³ … scale with the data).
    pub lambda: f64,
    /// Effective degrees of freedom, tr(A(λ)).
    pub edf: f64,
    /// Diagonal of the hat matrix (leverage of each point), in knot order.
    pub leverage: Vec<f64>,
}

/// Symmetric band matrix with half-bandwidth 2, stored as rows of [a(i,i-2), a(i,i-1), a(i,i)].
#[derive(Clone)]
struct Band {
    rows: Vec<[f64; 3]>,
}

impl Band {
    fn zeros(m: usize) -> Band {
        Band { rows: vec![[0.0; 3]; m] }
    }
    /// a(i, j) for j ≤ i ≤ j + 2.
    fn at(&mut self, i: usize, j: usize) -> &mut f64 {
        &mut self.rows[i][2 + j - i]
    }
    fn get(&self, i: usize, j: usize) -> f64 {
        let (i, j) = if i >= j { (i, j) } else { (j, i) };
        if i - j > 2 { 0.0 } else { self.rows[i][2 + j - i] }
    }
    /// In-place Cholesky factor L (same band). Errors when not positive definite.
    fn cholesky(&self) -> Result<Band> {
        let m = self.rows.len();
        let mut l = Band::zeros(m);
        for i in 0..m {
            for j in i.saturating_sub(2)..=i {
                let mut s = self.get(i, j);
                for k in i.saturating_sub(2)..j {
                    s -= l.get(i, k) * l.get(j, k);
                }
                if i == j {
                    if s <= 0.0 {
                        return Err(Error::invalid("smoothing spline system is not positive definite (repeated angles?)"));
                    }
                    *l.at(i, i) = s.sqrt();
                } else {
                    *l.at(i, j) = s / l.get(j, j);
                }
            }
        }
        Ok(l)
    }
    /// Solves L Lᵀ x = b with `self` = L.
    fn solve(&self, b: &[f64]) -> Vec<f64> {
        let m = b.len();
        let mut y = b.to_vec();
        for i in 0..m {
            for k in i.saturating_sub(2)..i {
                y[i] -= self.get(i, k) * y[k];
            }
            y[i] /= self.get(i, i);
        }
        for i in (0..m).rev() {
            for k in i + 1..(i + 3).min(m) {
                y[i] -= self.get(k, i) * y[k];
            }
            y[i] /= self.get(i, i);
        }
        y
    }
    /// The band (|i − j| ≤ 2) of M⁻¹ with `self` = L, M = L Lᵀ, as rows [z(i,i), z(i,i+1),
    /// z(i,i+2)]: the back recursion of Hutchinson & de Hoog (1985) from U = Lᵀ,
    /// z(i,j) = (δᵢⱼ/uᵢᵢ − Σₖ₌ᵢ₊₁..ᵢ₊₂ uᵢₖ z(k,j)) / uᵢᵢ for i ≤ j ≤ i + 2, i from the last row up.
    /// O(m) where solving for each column would be O(m²).
    fn inverse_band(&self) -> Vec<[f64; 3]> {
        let m = self.rows.len();
        let mut z = vec![[0.0f64; 3]; m];
        for i in (0..m).rev() {
            let uii = self.get(i, i);
            for d in (0..3).rev() {
                let j = i + d;
                if j >= m {
                    continue;
                }
                let mut s = if d == 0 { 1.0 / uii } else { 0.0 };
                for k in i + 1..(i + 3).min(m) {
                    s -= self.get(k, i) * band_at(&z, k, j);
                }
                z[i][d] = s / uii;
            }
        }
        z
    }
}

/// Entry (a, b) of a symmetric matrix kept as its band rows [z(i,i), z(i,i+1), z(i,i+2)]
/// ([`Band::inverse_band`]); 0 outside the band or the matrix.
fn band_at(z: &[[f64; 3]], a: usize, b: usize) -> f64 {
    let (a, b) = if a <= b { (a, b) } else { (b, a) };
    if b - a > 2 || b >= z.len() { 0.0 } else { z[a][b - a] }
}

struct System {
    n: usize,
    h: Vec<f64>,
    /// 1/wᵢ
    winv: Vec<f64>,
    r: Band,
    qtq: Band,
}

impl System {
    /// `w`: positive weights, one a knot.
    fn new(x: &[f64], w: &[f64]) -> System {
        let n = x.len();
        let h: Vec<f64> = x.windows(2).map(|w| w[1] - w[0]).collect();
        let m = n - 2;
        let mut r = Band::zeros(m);
        let mut qtq = Band::zeros(m);
        for j in 0..m {
            *r.at(j, j) = (h[j] + h[j + 1]) / 3.0;
            if j > 0 {
                *r.at(j, j - 1) = h[j] / 6.0;
            }
        }
        // column j of Q has entries at rows j, j+1, j+2
        let col = |j: usize| -> [(usize, f64); 3] { [(j, 1.0 / h[j]), (j + 1, -1.0 / h[j] - 1.0 / h[j + 1]), (j + 2, 1.0 / h[j + 1])] };
        for i in 0..m {
            for j in i.saturating_sub(2)..=i {
                let mut s = 0.0;
                for (ri, vi) in col(i) {
                    for (rj, vj) in col(j) {
                        if ri == rj {
                            s += vi * vj / w[ri];
                        }
                    }
                }
                *qtq.at(i, j) = s;
            }
        }
        System { n, h, winv: w.iter().map(|w| 1.0 / w).collect(), r, qtq }
    }

    fn qt(&self, y: &[f64]) -> Vec<f64> {
        (0..self.n - 2).map(|j| y[j] / self.h[j] - y[j + 1] * (1.0 / self.h[j] + 1.0 / self.h[j + 1]) + y[j + 2] / self.h[j + 1]).collect()
    }

    fn q(&self, gamma: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; self.n];
        for (j, g) in gamma.iter().enumerate() {
            out[j] += g / self.h[j];
            out[j + 1] -= g * (1.0 / self.h[j] + 1.0 / self.h[j + 1]);
            out[j + 2] += g / self.h[j + 1];
        }
        out
    }

    /// Row i of Q as (column, value) pairs.
    fn q_row(&self, i: usize) -> Vec<(usize, f64)> {
        let (m, h) = (self.n - 2, &self.h);
        let mut row = vec![];
        if i >= 2 {
            row.push((i - 2, 1.0 / h[i - 1]));
        }
        if i >= 1 && i - 1 < m {
            row.push((i - 1, -1.0 / h[i - 1] - 1.0 / h[i]));
        }
        if i < m {
            row.push((i, 1.0 / h[i]));
        }
        row
    }

    /// Diagonal of the hat matrix at λ, from the Cholesky factor `l` of M.
    fn leverage(&self, l: &Band, lambda: f64) -> Vec<f64> {
        // row i of Q has its entries within two columns of each other: only M⁻¹'s band is needed
        let z = l.inverse_band();
        (0..self.n)
            .map(|i| {
                let row = self.q_row(i);
                let quad: f64 =
                    row.iter().flat_map(|&(a, va)| row.iter().map(move |&(b, vb)| (a, va, b, vb))).map(|(a, va, b, vb)| va * vb * band_at(&z, a, b)).sum();
                1.0 - lambda * self.winv[i] * quad
            })
            .collect()
    }

    fn matrix(&self, lambda: f64) -> Band {
        let mut m = self.r.clone();
        for (row, q) in m.rows.iter_mut().zip(&self.qtq.rows) {
            for k in 0..3 {
                row[k] += lambda * q[k];
            }
        }
        m
    }

    /// (γ, fitted values, tr A) at λ.
    fn fit(&self, y: &[f64], lambda: f64, want_trace: bool) -> Result<(Vec<f64>, Vec<f64>, f64)> {
        let l = self.matrix(lambda).cholesky()?;
        let gamma = l.solve(&self.qt(y));
        let qg = self.q(&gamma);
        let g: Vec<f64> = y.iter().zip(&qg).zip(&self.winv).map(|((y, q), wi)| y - lambda * wi * q).collect();
        let mut tr = f64::NAN;
        if want_trace {
            // tr A = n − λ tr(M⁻¹ QᵀQ); QᵀQ is pentadiagonal, so only M⁻¹'s band counts
            let z = l.inverse_band();
            let m = z.len();
            let q = |i: usize, j: usize| if j < m { self.qtq.get(i, j) } else { 0.0 };
            let t: f64 = z.iter().enumerate().map(|(i, zi)| zi[0] * q(i, i) + 2.0 * (zi[1] * q(i, i + 1) + zi[2] * q(i, i + 2))).sum();
            tr = self.n as f64 - lambda * t;
        }
        Ok((gamma, g, tr))
    }
}

impl SmoothSpline {
    /// Fits y(x). `x` must be strictly increasing with at least 4 points. `lambda`: None chooses it
    /// by generalized cross-validation over a log grid scaled to the knot spacing.
    ///
    /// ```
    /// use ductline::spline::SmoothSpline;
    /// // a straight line is not penalised: any smoothing reproduces it exactly
    /// let x = [0.0, 1.0, 2.5, 3.0, 4.0];
    /// let y: Vec<f64> = x.iter().map(|x| 2.0 * x + 1.0).collect();
    /// let s = SmoothSpline::fit(&x, &y, Some(10.0)).unwrap();
    /// assert!((s.eval(2.0) - 5.0).abs() < 1e-9);
    /// ```
    pub fn fit(x: &[f64], y: &[f64], lambda: Option<f64>) -> Result<SmoothSpline> {
        Self::fit_weighted(x, y, &vec![1.0; x.len()], lambda)
    }

    /// Fits y(x) with positive weights `w` (a weight scales a point's squared residual).
    pub fn fit_weighted(x: &[f64], y: &[f64], w: &[f64], lambda: Option<f64>) -> Result<SmoothSpline> {
        let n = x.len();
        if n < 4 || y.len() != n || w.len() != n {
            return Err(Error::invalid(format!("a smoothing spline needs at least 4 points, got {n}")));
        }
        if x.windows(2).any(|w| !(w[1] > w[0])) {
            return Err(Error::invalid("spline abscissae must be strictly increasing"));
        }
        if w.iter().any(|w| !(*w > 0.0 && w.is_finite())) {
            return Err(Error::invalid("spline weights must be positive"));
        }
        let sys = System::new(x, w);
        let lambda = match lambda {
            Some(l) if l >= 0.0 && l.is_finite() => l,
            Some(l) => return Err(Error::invalid(format!("smoothing must be ≥ 0, got {l}"))),
            None => gcv_lambda(&sys, y)?,
        };
        let (gamma_in, g, edf) = sys.fit(y, lambda, true)?;
        let leverage = sys.leverage(&sys.matrix(lambda).cholesky()?, lambda);
        let mut gamma = vec![0.0; n];
        gamma[1..n - 1].copy_from_slice(&gamma_in);
        Ok(SmoothSpline { x: x.to_vec(), g, gamma, lambda, edf, leverage })
    }

    /// Knot range.
    pub fn range(&self) -> (f64, f64) {
        (self.x[0], self.x[self.x.len() - 1])
    }

    /// (value, first, second derivative) at `t`; linear beyond the knots.
    pub fn eval3(&self, t: f64) -> (f64, f64, f64) {
        let n = self.x.len();
        if t <= self.x[0] || t >= self.x[n - 1] {
            let (i, x0) = if t <= self.x[0] { (0, self.x[0]) } else { (n - 2, self.x[n - 1]) };
            let end = if t <= self.x[0] { 0 } else { n - 1 };
            let d1 = self.slope(i, x0);
            return (self.g[end] + d1 * (t - x0), d1, 0.0);
        }
        let i = match self.x.binary_search_by(|v| v.total_cmp(&t)) {
            Ok(i) => i.min(n - 2),
            Err(i) => i - 1,
        };
        let h = self.x[i + 1] - self.x[i];
        let a = (self.x[i + 1] - t) / h;
        let b = (t - self.x[i]) / h;
        let (gi, gj, ci, cj) = (self.g[i], self.g[i + 1], self.gamma[i], self.gamma[i + 1]);
        let v = a * gi + b * gj + ((a * a * a - a) * ci + (b * b * b - b) * cj) * h * h / 6.0;
        let d1 = (gj - gi) / h - (3.0 * a * a - 1.0) / 6.0 * h * ci + (3.0 * b * b - 1.0) / 6.0 * h * cj;
        let d2 = a * ci + b * cj;
        (v, d1, d2)
    }

    fn slope(&self, i: usize, t: f64) -> f64 {
        let h = self.x[i + 1] - self.x[i];
        let a = (self.x[i + 1] - t) / h;
        let b = (t - self.x[i]) / h;
        (self.g[i + 1] - self.g[i]) / h - (3.0 * a * a - 1.0) / 6.0 * h * self.gamma[i] + (3.0 * b * b - 1.0) / 6.0 * h * self.gamma[i + 1]
    }

    pub fn eval(&self, t: f64) -> f64 {
        self.eval3(t).0
    }
}

/// λ minimising GCV(λ) = n·RSS_w/(n − tr A)² (RSS_w = Σ wᵢ(yᵢ − gᵢ)², weights scaled to mean 1)
/// on a log grid, refined by golden-section search.
fn gcv_lambda(sys: &System, y: &[f64]) -> Result<f64> {
    let n = sys.n as f64;
    let wmean = sys.winv.iter().map(|wi| 1.0 / wi).sum::<f64>() / n;
    let hbar = sys.h.iter().sum::<f64>() / sys.h.len() as f64;
    let scale = hbar.powi(3);
    let score = |lg: f64| -> f64 {
        let lambda = scale * 10f64.powf(lg);
        match sys.fit(y, lambda, true) {
            Ok((_, g, tr)) => {
                let rss: f64 = y.iter().zip(&g).zip(&sys.winv).map(|((a, b), wi)| (a - b).powi(2) / wi).sum::<f64>() / wmean;
                n * rss / (n - tr).max(1e-9).powi(2)
            }
            Err(_) => f64::INFINITY,
        }
    };
    let grid: Vec<f64> = (0..=60).map(|i| -6.0 + i as f64 * 0.25).collect();
    let scores: Vec<f64> = grid.iter().map(|&g| score(g)).collect();
    let best = (0..grid.len()).min_by(|&a, &b| scores[a].total_cmp(&scores[b])).unwrap_or(0);
    let (mut lo, mut hi) = (grid[best.saturating_sub(1)], grid[(best + 1).min(grid.len() - 1)]);
    // golden-section search: each step keeps one inner point and its score (φ² = 1 − φ)
    let phi = 0.618_033_988_75;
    let (mut a, mut b) = (hi - phi * (hi - lo), lo + phi * (hi - lo));
    let (mut fa, mut fb) = (score(a), score(b));
    for _ in 0..30 {
        if fa < fb {
            (hi, b, fb) = (b, a, fa);
            a = hi - phi * (hi - lo);
            fa = score(a);
        } else {
            (lo, a, fa) = (a, b, fb);
            b = lo + phi * (hi - lo);
            fb = score(b);
        }
    }
    Ok(scale * 10f64.powf(0.5 * (lo + hi)))
}
