//! Small dense LU factorization with partial pivoting, for the implicit
//! method's Newton iterations. Written out so the operation order (and so
//! every bit of the result) is fixed.

#[derive(Debug, Clone)]
pub struct Lu {
    n: usize,
    a: Vec<f64>,
    piv: Vec<usize>,
}

impl Lu {
    pub fn new(n: usize) -> Lu {
        Lu {
            n,
            a: vec![0.0; n * n],
            piv: vec![0; n],
        }
    }

    /// Factor `I - c J` for a row-major Jacobian `j`. Returns false when the
    /// matrix is singular to working precision.
    pub fn factor_shifted(&mut self, j: &[f64], c: f64) -> bool {
        let n = self.n;
        for r in 0..n {
            for k in 0..n {
                let id = if r == k { 1.0 } else { 0.0 };
                self.a[r * n + k] = id - c * j[r * n + k];
            }
        }
        self.factor()
    }

    fn factor(&mut self) -> bool {
        let n = self.n;
        let a = &mut self.a;
        for k in 0..n {
            let mut p = k;
            let mut best = a[k * n + k].abs();
            for r in k + 1..n {
                let v = a[r * n + k].abs();
                if v > best {
                    best = v;
                    p = r;
                }
            }
            self.piv[k] = p;
            if best == 0.0 || !best.is_finite() {
                return false;
            }
            if p != k {
                for col in 0..n {
                    a.swap(k * n + col, p * n + col);
                }
            }
            let d = a[k * n + k];
            for r in k + 1..n {
                let f = a[r * n + k] / d;
                a[r * n + k] = f;
                if f != 0.0 {
                    for col in k + 1..n {
                        a[r * n + col] -= f * a[k * n + col];
                    }
                }
            }
        }
        true
    }

    /// Solve in place: `b` becomes the solution.
    pub fn solve(&self, b: &mut [f64]) {
        let n = self.n;
        let a = &self.a;
        for k in 0..n {
            let p = self.piv[k];
            if p != k {
                b.swap(k, p);
            }
            for r in k + 1..n {
                b[r] -= a[r * n + k] * b[k];
            }
        }
        for k in (0..n).rev() {
            let mut s = b[k];
            for col in k + 1..n {
                s -= a[k * n + col] * b[col];
            }
            b[k] = s / a[k * n + k];
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn solves_a_pivoting_system() {
        // I - 1*J with J chosen so that I - J = [[0, 2], [3, 4]] needs a pivot.
        let j = [1.0, -2.0, -3.0, -3.0];
        let mut lu = Lu::new(2);
        assert!(lu.factor_shifted(&j, 1.0));
        let mut b = [4.0, 11.0];
        lu.solve(&mut b);
        // 2 y = 4, 3 x + 4 y = 11  =>  y = 2, x = 1
        assert!((b[0] - 1.0).abs() < 1e-15 && (b[1] - 2.0).abs() < 1e-15);
    }
}
