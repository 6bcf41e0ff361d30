//! Moisture bases and water fractions: the one place where they convert.
//!
//! - Wet basis M_wb = water mass / total mass x 100 (grain, food, feed).
//! - Dry basis M_db = water mass / dry mass x 100 (timber per ASTM D4442,
//!   soil per ASTM D2216).
//! - Volumetric water fraction theta = water volume / bulk volume, from the
//!   wet bulk density rho_b: theta = (M_wb / 100) rho_b / rho_w.
//!
//! Densities in kg/m^3; water density [`RHO_WATER`] is taken as constant
//! (common practice, no source; 997 kg/m^3 at 25 C would change theta 0.3 %).

use crate::real::Real;

/// Density of water used for volumetric fractions, kg/m^3.
pub const RHO_WATER: f64 = 1000.0;

/// Moisture basis of a product's result.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Basis {
    /// Water mass / total mass x 100.
    #[default]
    Wet,
    /// Water mass / dry mass x 100.
    Dry,
}

/// Highest moisture on a dry basis a calibration takes, % (90.9 % on a wet
/// basis; green wood and biomass exceed 100 % on a dry basis).
pub const MAX_DRY_BASIS_PCT: f64 = 1000.0;

/// Dry basis from wet basis: M_db = 100 M_wb / (100 - M_wb), % (M_wb < 100).
#[inline]
pub fn wet_to_dry<T: Real>(m_wb_pct: T) -> T {
    T::c(100.0) * m_wb_pct / (T::c(100.0) - m_wb_pct)
}

/// Wet basis from dry basis: M_wb = 100 M_db / (100 + M_db), %.
#[inline]
pub fn dry_to_wet<T: Real>(m_db_pct: T) -> T {
    T::c(100.0) * m_db_pct / (T::c(100.0) + m_db_pct)
}

/// Converts a moisture value between bases.
#[inline]
pub fn convert<T: Real>(m_pct: T, from: Basis, to: Basis) -> T {
    match (from, to) {
        (Basis::Wet, Basis::Dry) => wet_to_dry(m_pct),
        (Basis::Dry, Basis::Wet) => dry_to_wet(m_pct),
        _ => m_pct,
    }
}

/// Mass left after drying `mass` from `m_from_wb_pct` to `m_to_wb_pct` (wet basis).
#[inline]
pub fn mass_after_drying<T: Real>(mass: T, m_from_wb_pct: T, m_to_wb_pct: T) -> T {
    mass * (T::c(100.0) - m_from_wb_pct) / (T::c(100.0) - m_to_wb_pct)
}

/// Volumetric water fraction theta from wet-basis moisture and wet bulk density.
#[inline]
pub fn volumetric_from_wet<T: Real>(m_wb_pct: T, bulk_density_kg_m3: T) -> T {
    m_wb_pct / T::c(100.0) * bulk_density_kg_m3 / T::c(RHO_WATER)
}

/// Wet-basis moisture, %, from theta and wet bulk density.
#[inline]
pub fn wet_from_volumetric<T: Real>(theta: T, bulk_density_kg_m3: T) -> T {
    T::c(100.0) * theta * T::c(RHO_WATER) / bulk_density_kg_m3
}

/// Volume fraction of dry solid from wet-basis moisture, wet bulk density and
/// the dry matter's particle density: (1 - M_wb/100) rho_b / rho_p.
#[inline]
pub fn solid_fraction_from_wet<T: Real>(
    m_wb_pct: T,
    bulk_density_kg_m3: T,
    particle_density_kg_m3: T,
) -> T {
    (T::one() - m_wb_pct / T::c(100.0)) * bulk_density_kg_m3 / particle_density_kg_m3
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn basis_conversions() {
        // docs/REFERENCES.md 5 [calc]: 14 % wb = 16.2791 % db; 20 % wb = 25.0000 % db.
        assert!((wet_to_dry(14.0f64) - 16.2791).abs() < 1e-4);
        assert!((wet_to_dry(20.0f64) - 25.0).abs() < 1e-12);
        assert!((dry_to_wet(25.0f64) - 20.0).abs() < 1e-12);
        assert!((convert(16.279_07f64, Basis::Dry, Basis::Wet) - 14.0).abs() < 1e-4);
        // Shrink: 1000 kg at 20 % wb dried to 14 % wb leaves 930.233 kg.
        assert!((mass_after_drying(1000.0f64, 20.0, 14.0) - 930.233).abs() < 1e-3);
    }

    #[test]
    fn volumetric_round_trip() {
        let theta = volumetric_from_wet(15.0f64, 750.0);
        assert!((theta - 0.1125).abs() < 1e-12);
        assert!((wet_from_volumetric(theta, 750.0) - 15.0).abs() < 1e-12);
        let vs = solid_fraction_from_wet(15.0f64, 750.0, 1400.0);
        assert!((vs - 0.85 * 750.0 / 1400.0).abs() < 1e-12);
    }
}
