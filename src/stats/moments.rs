//! Centred co-moments of (x, y), updated one point at a time.
//!
//! # Numerics
//!
//! The textbook one-pass sums (Σx², Σxy) subtract two huge, nearly equal
//! numbers when x is far from zero: for decimal years (≈ 2026 with a spread
//! of months) or Unix seconds (≈ 1.7e9) they lose every digit. Here x is
//! first shifted by a fixed per-series origin (the first x seen) and the
//! centred sums are updated with Welford's (1962) co-moment recurrences, so
//! each update only adds small, well-conditioned terms.
//!
//! The residual sum of squares is carried along by the recursive-residual
//! identity (Brown, Durbin & Evans 1975): a point arriving with prediction
//! residual `d` against the old fit and `v = 1/n + (x − x̄)²/Sxx` adds
//! `d²/(1 + v)`. That sum of non-negative terms stays accurate when the fit
//! is nearly exact, where `Syy − Sxy²/Sxx` would cancel.
//!
//! Removing a point reverses both recurrences. Removal is a subtraction, so
//! removing a point that carries almost all of the scatter loses relative
//! precision in what remains (as every downdating scheme does); callers that
//! hold all the data recompute such cases in batch (see `influence`).

/// Co-moments of a set of (x, y) points: count, means, centred sums of
/// squares and products, and the residual sum of squares of the
/// least-squares line through them.
///
/// 64 bytes; `add` and `remove` are O(1).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Moments {
    n: u64,
    origin: f64,
    mean_x: f64,
    mean_y: f64,
    sxx: f64,
    sxy: f64,
    syy: f64,
    sse: f64,
}

/// The fields of [`Moments`], for storage and exact resumption.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct MomentsParts {
    /// Number of points.
    pub n: u64,
    /// x origin.
    pub origin: f64,
    /// Mean of x − origin.
    pub mean_x: f64,
    /// Mean of y.
    pub mean_y: f64,
    /// Σ(x − x̄)².
    pub sxx: f64,
    /// Σ(x − x̄)(y − ȳ).
    pub sxy: f64,
    /// Σ(y − ȳ)².
    pub syy: f64,
    /// Residual sum of squares.
    pub sse: f64,
}

impl Moments {
    /// The stored fields; `from_parts(m.to_parts()) == m` bit for bit.
    pub fn to_parts(&self) -> MomentsParts {
        MomentsParts {
            n: self.n,
            origin: self.origin,
            mean_x: self.mean_x,
            mean_y: self.mean_y,
            sxx: self.sxx,
            sxy: self.sxy,
            syy: self.syy,
            sse: self.sse,
        }
    }

    /// Rebuilds co-moments from stored fields.
    pub fn from_parts(p: MomentsParts) -> Moments {
        Moments {
            n: p.n,
            origin: p.origin,
            mean_x: p.mean_x,
            mean_y: p.mean_y,
            sxx: p.sxx,
            sxy: p.sxy,
            syy: p.syy,
            sse: p.sse,
        }
    }

    /// An empty set.
    pub const fn new() -> Self {
        Moments {
            n: 0,
            origin: 0.0,
            mean_x: 0.0,
            mean_y: 0.0,
            sxx: 0.0,
            sxy: 0.0,
            syy: 0.0,
            sse: 0.0,
        }
    }

    /// Co-moments of a batch by the centred two-pass method.
    ///
    /// The caller has checked that every value is finite. The origin is
    /// `x[0]` so that the result agrees with streaming the same points.
    pub fn from_points(x: &[f64], y: &[f64]) -> Self {
        let Some(&origin) = x.first() else {
            return Moments::new();
        };
        let n = x.len().min(y.len());
        let nf = n as f64;
        let (mut sx, mut sy) = (0.0, 0.0);
        for i in 0..n {
            sx += x[i] - origin;
            sy += y[i];
        }
        let (mut mx, mut my) = (sx / nf, sy / nf);
        // Second pass with the correction term of Chan, Golub & LeVeque
        // (1983): the residual sums of the deviations fix the rounding
        // error of the first-pass means.
        let (mut cx, mut cy) = (0.0, 0.0);
        for i in 0..n {
            cx += (x[i] - origin) - mx;
            cy += y[i] - my;
        }
        mx += cx / nf;
        my += cy / nf;
        let (mut sxx, mut sxy, mut syy) = (0.0, 0.0, 0.0);
        for i in 0..n {
            let dx = (x[i] - origin) - mx;
            let dy = y[i] - my;
            sxx += dx * dx;
            sxy += dx * dy;
            syy += dy * dy;
        }
        let mut m = Moments {
            n: n as u64,
            origin,
            mean_x: mx,
            mean_y: my,
            sxx,
            sxy,
            syy,
            sse: syy,
        };
        if sxx > 0.0 {
            // SSE from the residuals themselves, not Syy − Sxy²/Sxx.
            let b = sxy / sxx;
            let mut sse = 0.0;
            for i in 0..n {
                let e = (y[i] - my) - b * ((x[i] - origin) - mx);
                sse += e * e;
            }
            m.sse = sse;
        }
        m
    }

    /// Adds one point. The caller has checked that both values are finite.
    pub fn add(&mut self, x: f64, y: f64) {
        if self.n == 0 {
            // Any origin is exact; the first x keeps later shifts small.
            self.origin = x;
        }
        let xs = x - self.origin;
        let n_old = self.n;
        let (sxx_old, syy_old) = (self.sxx, self.syy);
        let dx = xs - self.mean_x;
        let dy = y - self.mean_y;
        let sse_increment = if n_old >= 2 && sxx_old > 0.0 {
            let d = dy - (self.sxy / sxx_old) * dx;
            let v = 1.0 / n_old as f64 + dx * dx / sxx_old;
            Some(d * d / (1.0 + v))
        } else {
            None
        };
        self.n = n_old + 1;
        let nf = self.n as f64;
        self.mean_x += dx / nf;
        self.mean_y += dy / nf;
        self.sxx += dx * (xs - self.mean_x);
        self.sxy += dx * (y - self.mean_y);
        self.syy += dy * (y - self.mean_y);
        self.sse = match sse_increment {
            Some(inc) => self.sse + inc,
            // All earlier x were equal: the line now runs through the mean
            // of the earlier points and the new one, leaving their spread.
            None if self.sxx > 0.0 => syy_old,
            None => self.syy,
        };
    }

    /// Removes one point that was added before (the caller guarantees it).
    pub fn remove(&mut self, x: f64, y: f64) {
        if self.n <= 1 {
            *self = Moments::new();
            return;
        }
        let xs = x - self.origin;
        let n = self.n as f64;
        let dx = xs - self.mean_x;
        let dy = y - self.mean_y;
        let sse_decrement = if self.sxx > 0.0 {
            let e = dy - (self.sxy / self.sxx) * dx;
            let h = 1.0 / n + dx * dx / self.sxx;
            Some((e, 1.0 - h))
        } else {
            None
        };
        self.n -= 1;
        let nn = self.n as f64;
        self.mean_x -= dx / nn;
        self.mean_y -= dy / nn;
        self.sxx = (self.sxx - dx * (xs - self.mean_x)).max(0.0);
        self.sxy -= dx * (y - self.mean_y);
        self.syy = (self.syy - dy * (y - self.mean_y)).max(0.0);
        if self.n == 1 {
            self.sxx = 0.0;
            self.sxy = 0.0;
            self.syy = 0.0;
        }
        self.sse = match sse_decrement {
            Some((e, one_minus_h)) if self.sxx > 0.0 && one_minus_h > 0.0 => {
                (self.sse - e * e / one_minus_h).max(0.0)
            }
            _ if self.sxx > 0.0 => (self.syy - self.sxy * self.sxy / self.sxx).max(0.0),
            _ => self.syy,
        };
    }

    /// The same set with one of its points removed.
    pub fn without(&self, x: f64, y: f64) -> Moments {
        let mut m = *self;
        m.remove(x, y);
        m
    }

    /// The same set with one more point.
    pub fn with(&self, x: f64, y: f64) -> Moments {
        let mut m = *self;
        m.add(x, y);
        m
    }

    /// Number of points.
    pub fn n(&self) -> u64 {
        self.n
    }
    /// The x origin: every x is stored as `x − origin`.
    pub fn origin(&self) -> f64 {
        self.origin
    }
    /// Mean of x, in original units.
    pub fn mean_x(&self) -> f64 {
        self.origin + self.mean_x
    }
    /// Mean of `x − origin`.
    pub fn mean_x_shifted(&self) -> f64 {
        self.mean_x
    }
    /// Mean of y.
    pub fn mean_y(&self) -> f64 {
        self.mean_y
    }
    /// Σ(x − x̄)².
    pub fn sxx(&self) -> f64 {
        self.sxx
    }
    /// Σ(x − x̄)(y − ȳ).
    pub fn sxy(&self) -> f64 {
        self.sxy
    }
    /// Σ(y − ȳ)².
    pub fn syy(&self) -> f64 {
        self.syy
    }
    /// Residual sum of squares of the least-squares line (Σ(y − ȳ)² while
    /// all x are equal).
    pub fn sse(&self) -> f64 {
        self.sse
    }
    /// Least-squares slope, when x varies.
    pub fn slope(&self) -> Option<f64> {
        (self.sxx > 0.0).then(|| self.sxy / self.sxx)
    }
    /// Fitted value at `x` (original units), when x varies.
    pub fn predict(&self, x: f64) -> Option<f64> {
        self.slope()
            .map(|b| self.mean_y + b * ((x - self.origin) - self.mean_x))
    }
    /// `v = 1/n + (x − x̄)²/Sxx`: the leverage `x` would have in this fit
    /// as an existing point, and the variance factor of a prediction there.
    pub fn leverage_factor(&self, x: f64) -> Option<f64> {
        if self.n == 0 || self.sxx <= 0.0 {
            return None;
        }
        let dx = (x - self.origin) - self.mean_x;
        Some(1.0 / self.n as f64 + dx * dx / self.sxx)
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol * a.abs().max(b.abs()).max(1e-300)
    }

    #[test]
    fn streaming_matches_batch_on_small_set() {
        let x = [1.0, 2.0, 4.0, 7.0, 11.0];
        let y = [2.1, 3.9, 8.2, 13.8, 22.5];
        let batch = Moments::from_points(&x, &y);
        let mut s = Moments::new();
        for (&a, &b) in x.iter().zip(&y) {
            s.add(a, b);
        }
        assert_eq!(s.n(), 5);
        for (a, b) in [
            (s.mean_x(), batch.mean_x()),
            (s.mean_y(), batch.mean_y()),
            (s.sxx(), batch.sxx()),
            (s.sxy(), batch.sxy()),
            (s.syy(), batch.syy()),
            (s.sse(), batch.sse()),
        ] {
            assert!(close(a, b, 1e-13), "{a} vs {b}");
        }
    }

    #[test]
    fn sse_starts_when_x_first_varies() {
        // Three points at one x: spread about their mean is 2; a fourth at a
        // new x leaves the line through (1, mean) and (5, 9): SSE stays 2.
        let mut m = Moments::new();
        for y in [1.0, 2.0, 3.0] {
            m.add(1.0, y);
        }
        assert_eq!(m.slope(), None);
        assert!(close(m.sse(), 2.0, 1e-15));
        m.add(5.0, 9.0);
        assert!(close(m.sse(), 2.0, 1e-15));
        assert!(close(m.slope().unwrap(), (9.0 - 2.0) / 4.0, 1e-15));
    }

    #[test]
    fn remove_undoes_add() {
        let x = [3.0, 1.0, 4.0, 1.5, 5.0, 9.0];
        let y = [2.0, 7.0, 1.0, 8.0, 2.0, 8.0];
        let all = Moments::from_points(&x, &y);
        let without_last = Moments::from_points(&x[..5], &y[..5]);
        let removed = all.without(9.0, 8.0);
        assert_eq!(removed.n(), 5);
        assert!(close(removed.sxx(), without_last.sxx(), 1e-13));
        assert!(close(removed.sxy(), without_last.sxy(), 1e-13));
        assert!(close(removed.sse(), without_last.sse(), 1e-12));
        assert!(close(removed.mean_x(), without_last.mean_x(), 1e-14));
    }

    #[test]
    fn removing_everything_leaves_an_empty_set() {
        let mut m = Moments::new();
        m.add(1.0, 2.0);
        m.add(2.0, 3.0);
        m.remove(1.0, 2.0);
        m.remove(2.0, 3.0);
        assert_eq!(m.n(), 0);
        assert_eq!(m.sxx(), 0.0);
        assert_eq!(m.slope(), None);
    }
}
