//! Hypsometry: the area of a planet's surface lying below each elevation,
//! and the basin volume and sea level that follow from it.
//!
//! The table gives A(z), the area below elevation z, at knots z_0 < ... <
//! z_n, linear between them. The basin volume below z is V(z) = ∫ A dz from
//! z_0, piecewise quadratic; sea level for a water volume is its inverse.
//! Above the highest knot the area is held at A(z_n) (the planet is covered).

#[derive(Debug, Clone)]
pub struct Hypsometry {
    z: Vec<f64>,
    a: Vec<f64>,
    /// Basin volume at each knot.
    v: Vec<f64>,
}

impl Hypsometry {
    /// Build from knots (elevation increasing). Areas must not decrease;
    /// the checker reports tables where they do.
    pub fn new(z: &[f64], a: &[f64]) -> Hypsometry {
        let mut v = Vec::with_capacity(z.len());
        let mut acc = 0.0;
        v.push(0.0);
        for i in 1..z.len() {
            acc += 0.5 * (a[i - 1] + a[i]) * (z[i] - z[i - 1]);
            v.push(acc);
        }
        Hypsometry {
            z: z.to_vec(),
            a: a.to_vec(),
            v,
        }
    }

    pub fn total_area(&self) -> f64 {
        *self.a.last().unwrap_or(&0.0)
    }

    fn area_at(&self, z: f64) -> f64 {
        crate::numeric::interp(&self.z, &self.a, z)
    }

    /// Volume of water needed to fill the basins up to elevation `z`.
    pub fn basin_volume(&self, z: f64) -> f64 {
        let n = self.z.len();
        if z.is_nan() || n == 0 {
            // (A NaN would find no knot below it; the checker refuses empty
            // tables, but native code must never meet a panic.)
            return f64::NAN;
        }
        if z <= self.z[0] {
            return 0.0;
        }
        if z >= self.z[n - 1] {
            return self.v[n - 1] + self.a[n - 1] * (z - self.z[n - 1]);
        }
        let i = self.z.partition_point(|&k| k <= z) - 1;
        let dz = z - self.z[i];
        self.v[i] + 0.5 * (self.a[i] + self.area_at(z)) * dz
    }

    /// Elevation of the water surface when `volume` fills the basins.
    pub fn sea_level(&self, volume: f64) -> f64 {
        let n = self.z.len();
        if volume.is_nan() || n == 0 {
            return f64::NAN;
        }
        if volume <= 0.0 {
            return self.z[0];
        }
        if volume >= self.v[n - 1] {
            let top = self.a[n - 1];
            return if top > 0.0 {
                self.z[n - 1] + (volume - self.v[n - 1]) / top
            } else {
                self.z[n - 1]
            };
        }
        // Segment i holds the volume: V = v_i + a_i s + (k/2) s^2, s = z - z_i.
        let i = self.v.partition_point(|&k| k <= volume) - 1;
        let i = i.min(n - 2);
        let dz = self.z[i + 1] - self.z[i];
        let k = (self.a[i + 1] - self.a[i]) / dz;
        let dv = volume - self.v[i];
        let a0 = self.a[i];
        let s = if k.abs() * dv <= 1e-12 * a0 * a0 {
            // Nearly constant area: avoid cancellation.
            if a0 > 0.0 {
                dv / a0
            } else {
                0.0
            }
        } else {
            // Stable root of (k/2) s^2 + a0 s - dv = 0.
            2.0 * dv / (a0 + libm::sqrt(a0 * a0 + 2.0 * k * dv))
        };
        self.z[i] + s.clamp(0.0, dz)
    }

    /// Sea level with the water load compensated: `volume` scaled by
    /// (rho_m - rho_w) / rho_m, the densities of mantle and water. (Native
    /// code performs these operations inline, in this order.)
    #[inline]
    pub fn sea_level_isostatic(&self, volume: f64, rho_w: f64, rho_m: f64) -> f64 {
        let f = (rho_m - rho_w) / rho_m;
        self.sea_level(volume * f)
    }

    /// Fraction of the surface above the water for `volume` of water.
    pub fn land_fraction(&self, volume: f64) -> f64 {
        let total = self.total_area();
        if total <= 0.0 {
            return 0.0;
        }
        let z = self.sea_level(volume);
        (1.0 - self.area_at(z) / total).clamp(0.0, 1.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flat_bottom_basin_matches_closed_form() {
        // A basin of 3e14 m^2 with vertical walls from -4000 m to 0 m, then land
        // rising linearly to 5.1e14 m^2 at +1000 m.
        let h = Hypsometry::new(
            &[-4000.0, -4000.0 + 1e-9, 0.0, 1000.0],
            &[0.0, 3e14, 3e14, 5.1e14],
        );
        let v = 3e14 * 2000.0;
        let z = h.sea_level(v);
        assert!((z - (-2000.0)).abs() < 1e-6, "{z}");
        assert!((h.basin_volume(z) - v).abs() / v < 1e-12);
        let lf = h.land_fraction(v);
        assert!((lf - (1.0 - 3e14 / 5.1e14)).abs() < 1e-12);
    }

    #[test]
    fn linear_slope_basin_matches_closed_form() {
        // A(z) = c (z - z0): V(z) = c (z - z0)^2 / 2, so z = z0 + sqrt(2 V / c).
        let c = 1e11;
        let z0 = -5000.0;
        let h = Hypsometry::new(&[z0, 0.0], &[0.0, c * 5000.0]);
        for v in [1e15, 5e16, 1e18] {
            let z = h.sea_level(v);
            let exact = z0 + (2.0 * v / c).sqrt();
            assert!((z - exact).abs() < 1e-9 * 5000.0, "{v}: {z} vs {exact}");
        }
    }

    #[test]
    fn overfull_basins_cover_the_planet() {
        let h = Hypsometry::new(&[-1000.0, 0.0, 1000.0], &[0.0, 1.0e14, 2.0e14]);
        let full = h.basin_volume(1000.0);
        assert_eq!(h.land_fraction(full * 1.5), 0.0);
        assert!((h.sea_level(full + 2.0e14 * 10.0) - 1010.0).abs() < 1e-9);
        assert_eq!(h.sea_level(-1.0), -1000.0);
    }

    #[test]
    fn not_a_number_in_gives_not_a_number_out() {
        let h = Hypsometry::new(&[-1000.0, 0.0, 1000.0], &[0.0, 1.0e14, 2.0e14]);
        assert!(h.sea_level(f64::NAN).is_nan());
        assert!(h.basin_volume(f64::NAN).is_nan());
        assert!(h.land_fraction(f64::NAN).is_nan());
        let empty = Hypsometry::new(&[], &[]);
        assert!(empty.sea_level(1.0).is_nan());
        assert!(empty.basin_volume(1.0).is_nan());
        assert_eq!(empty.land_fraction(1.0), 0.0);
    }
}
