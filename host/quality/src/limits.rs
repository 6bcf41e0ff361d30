//! Alarm limits of a line: the moisture band and the largest uncertainty
//! the plant accepts (`[alarm]` of a line file for `fringe monitor`,
//! `[alarm]` and `[device.alarm]` of a site file for `fringe gateway`).
//! A reading outside is marked with the limit's word; the limits are the
//! plant's own (common practice, no source).

use fringe_calibration::moisture::{convert, Basis};
use serde::{Deserialize, Serialize};

/// Alarm limits (every one optional).
#[derive(Debug, Clone, Copy, PartialEq, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct AlarmLimits {
    /// Low moisture limit, %.
    pub moisture_low_pct: Option<f32>,
    /// High moisture limit, %.
    pub moisture_high_pct: Option<f32>,
    /// Largest acceptable uncertainty, %.
    pub uncertainty_max_pct: Option<f32>,
    /// The moisture basis the limits are written on (`basis = "dry"`):
    /// on a wet basis (the default) they end at 100 %, on a dry one at
    /// 327.67 % (the highest moisture a reading carries), so that a
    /// wet-basis limit written in per mille (155 for
    /// 15.5 %) is caught, not taken.
    #[serde(default)]
    pub basis: LimitBasis,
}

/// The moisture basis of alarm limits (and its word in files and JSON).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum LimitBasis {
    /// Water over wet mass: below 100 %.
    #[default]
    Wet,
    /// Water over dry mass: up to 327.67 % (green wood, biomass).
    Dry,
}

impl LimitBasis {
    /// `wet` or `dry`.
    pub fn word(self) -> &'static str {
        match self {
            LimitBasis::Wet => "wet",
            LimitBasis::Dry => "dry",
        }
    }

    fn basis(self) -> Basis {
        match self {
            LimitBasis::Wet => Basis::Wet,
            LimitBasis::Dry => Basis::Dry,
        }
    }
}

impl From<Basis> for LimitBasis {
    fn from(b: Basis) -> Self {
        match b {
            Basis::Wet => LimitBasis::Wet,
            Basis::Dry => LimitBasis::Dry,
        }
    }
}

impl From<fringe_protocol::Basis> for LimitBasis {
    /// The basis a device's product calibration reports on.
    fn from(b: fringe_protocol::Basis) -> Self {
        match b {
            fringe_protocol::Basis::Wet => LimitBasis::Wet,
            fringe_protocol::Basis::Dry => LimitBasis::Dry,
        }
    }
}

impl From<LimitBasis> for fringe_protocol::Basis {
    fn from(b: LimitBasis) -> Self {
        match b {
            LimitBasis::Wet => fringe_protocol::Basis::Wet,
            LimitBasis::Dry => fringe_protocol::Basis::Dry,
        }
    }
}

/// A limit that cannot be used: its key, its value, the rule.
#[derive(Debug, Clone, PartialEq)]
pub struct BadLimit {
    /// The key (`moisture_low_pct`, ...).
    pub key: &'static str,
    /// The value as written.
    pub value: String,
    /// What it must be.
    pub rule: &'static str,
}

impl AlarmLimits {
    /// Which limits `moisture_pct` +- `uncertainty_pct` breaks, as words
    /// (`LOW`, `HIGH`, `UNCERTAIN`).
    pub fn check(&self, moisture_pct: Option<f32>, uncertainty_pct: f32) -> Vec<&'static str> {
        let mut out = Vec::new();
        if let Some(m) = moisture_pct {
            if self.moisture_low_pct.is_some_and(|l| m < l) {
                out.push("LOW");
            }
            if self.moisture_high_pct.is_some_and(|h| m > h) {
                out.push("HIGH");
            }
        }
        if self
            .uncertainty_max_pct
            .is_some_and(|u| uncertainty_pct.is_nan() || uncertainty_pct > u)
        {
            out.push("UNCERTAIN");
        }
        out
    }

    /// The limits are percentages, 0 to 100 on a wet basis, 0 to 327.67 on
    /// a dry one ([`AlarmLimits::basis`]; green wood and biomass hold more
    /// water than dry matter; a reading carries moisture up to
    /// [`fringe_protocol::quant::MOISTURE_MAX_PCT`]), and the low one is
    /// below the high one.
    ///
    /// # Errors
    /// The first [`BadLimit`].
    pub fn validate(&self) -> Result<(), BadLimit> {
        let (top, rule) = match self.basis {
            LimitBasis::Wet => (
                100.0,
                "must be 0..=100 % (on a dry basis up to 327.67 %: basis = \"dry\" in the same table)",
            ),
            LimitBasis::Dry => (
                fringe_protocol::quant::MOISTURE_MAX_PCT,
                "must be 0..=327.67 % (basis = \"dry\": the highest moisture a reading carries)",
            ),
        };
        for (key, v) in [
            ("moisture_low_pct", self.moisture_low_pct),
            ("moisture_high_pct", self.moisture_high_pct),
            ("uncertainty_max_pct", self.uncertainty_max_pct),
        ] {
            if let Some(x) = v {
                if !(0.0..=top).contains(&x) {
                    return Err(BadLimit {
                        key,
                        value: x.to_string(),
                        rule,
                    });
                }
            }
        }
        if let (Some(l), Some(h)) = (self.moisture_low_pct, self.moisture_high_pct) {
            if l >= h {
                return Err(BadLimit {
                    key: "moisture_low_pct",
                    value: l.to_string(),
                    rule: "must be below moisture_high_pct",
                });
            }
        }
        Ok(())
    }

    /// These limits for readings on `basis`: the moisture band as written
    /// when the bases agree, else converted (wet to dry M_db = 100 M_wb /
    /// (100 - M_wb), dry to wet M_wb = 100 M_db / (100 + M_db)), so that a
    /// band written for one basis marks the same product states on the
    /// other; the uncertainty limit as written. `None` when nothing changed.
    pub fn on_basis(&self, basis: LimitBasis) -> Option<AlarmLimits> {
        if basis == self.basis
            || (self.moisture_low_pct.is_none() && self.moisture_high_pct.is_none())
        {
            return None;
        }
        let to = |m: f32| convert(m, self.basis.basis(), basis.basis());
        Some(AlarmLimits {
            moisture_low_pct: self.moisture_low_pct.map(to),
            moisture_high_pct: self.moisture_high_pct.map(to),
            uncertainty_max_pct: self.uncertainty_max_pct,
            basis,
        })
    }

    /// Which limits a reading on `reading_basis` breaks: where that is not
    /// the limits' basis, its moisture and uncertainty are converted to it
    /// first (wet to dry M_db = 100 M_wb / (100 - M_wb), the uncertainty
    /// times dM_db/dM_wb = 10^4 / (100 - M_wb)^2; dry to wet M_wb = 100 M_db
    /// / (100 + M_db), times 10^4 / (100 + M_db)^2), so that the band marks
    /// the same product states on either basis; as they are when the bases
    /// agree or the reading's is unknown.
    pub fn check_reading(
        &self,
        moisture_pct: Option<f32>,
        uncertainty_pct: f32,
        reading_basis: Option<LimitBasis>,
    ) -> Vec<&'static str> {
        let (m, u) = self.on_limits_basis(moisture_pct, uncertainty_pct, reading_basis);
        self.check(m, u)
    }

    /// A reading's moisture and uncertainty on the limits' basis (as
    /// [`AlarmLimits::check_reading`] converts them).
    fn on_limits_basis(
        &self,
        moisture_pct: Option<f32>,
        uncertainty_pct: f32,
        reading_basis: Option<LimitBasis>,
    ) -> (Option<f32>, f32) {
        match (reading_basis, moisture_pct) {
            (Some(b), Some(m)) if b != self.basis => {
                // d(convert)/dm: 10^4 / (100 -+ m)^2.
                let slope = match self.basis {
                    LimitBasis::Dry => 1e4 / ((100.0 - m) * (100.0 - m)),
                    LimitBasis::Wet => 1e4 / ((100.0 + m) * (100.0 + m)),
                };
                (
                    Some(convert(m, b.basis(), self.basis.basis())),
                    uncertainty_pct * slope,
                )
            }
            _ => (moisture_pct, uncertainty_pct),
        }
    }

    /// [`AlarmLimits::describe`] of a reading on `reading_basis`: where
    /// that is not the limits' basis, the values on the limits' basis and
    /// then the reading as it came (`moisture 18.93 % dry basis above the
    /// high limit 18.34 % dry basis (the reading: 15.92 % wet basis)`).
    pub fn describe_reading(
        &self,
        word: &str,
        moisture_pct: Option<f32>,
        uncertainty_pct: f32,
        reading_basis: Option<LimitBasis>,
    ) -> String {
        match (reading_basis, moisture_pct) {
            (Some(b), Some(m)) if b != self.basis => {
                let (m2, u2) = self.on_limits_basis(moisture_pct, uncertainty_pct, reading_basis);
                let lb = self.basis.word();
                let said = self
                    .describe(word, m2, u2)
                    .replace(" %", &format!(" % {lb} basis"));
                let u = if uncertainty_pct.is_nan() {
                    String::new()
                } else {
                    format!(" +- {uncertainty_pct:.2} %")
                };
                format!("{said} (the reading: {m:.2} %{u} {} basis)", b.word())
            }
            _ => self.describe(word, moisture_pct, uncertainty_pct),
        }
    }

    /// How these limits are taken for readings on `basis`, in words, where
    /// that is not their basis (`None` where they are taken as written):
    /// what `fringe monitor` and `fringe gateway` say before they check.
    pub fn taken_as(&self, basis: LimitBasis) -> Option<String> {
        let converted = self.on_basis(basis)?;
        Some(format!(
            "alarm limits written on a {} basis, the device reports on a {} one: moisture band {} % taken as {} % (the same product states; each reading is converted to the {} basis to be checked, its uncertainty with it)",
            self.basis.word(),
            basis.word(),
            self.band(),
            converted.band(),
            self.basis.word(),
        ))
    }

    /// The moisture band in words: `12.00..15.50` (`--` for a side
    /// without a limit).
    pub fn band(&self) -> String {
        let f = |v: Option<f32>| v.map_or("--".to_string(), |m| format!("{m:.2}"));
        format!(
            "{}..{}",
            f(self.moisture_low_pct),
            f(self.moisture_high_pct)
        )
    }

    /// What a broken limit means, for a person: `moisture 16.20 % above
    /// the high limit 15.50 %`.
    pub fn describe(&self, word: &str, moisture_pct: Option<f32>, uncertainty_pct: f32) -> String {
        let m = moisture_pct.map_or("--".to_string(), |m| format!("{m:.2}"));
        match word {
            "LOW" => format!(
                "moisture {m} % below the low limit {:.2} %",
                self.moisture_low_pct.unwrap_or(f32::NAN)
            ),
            "HIGH" => format!(
                "moisture {m} % above the high limit {:.2} %",
                self.moisture_high_pct.unwrap_or(f32::NAN)
            ),
            _ => format!(
                "uncertainty {} above the largest accepted {:.2} %",
                if uncertainty_pct.is_nan() {
                    "unknown".to_string()
                } else {
                    format!("{uncertainty_pct:.2} %")
                },
                self.uncertainty_max_pct.unwrap_or(f32::NAN)
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A dry-basis band of 20..24.5 %.
    fn dry_band() -> AlarmLimits {
        AlarmLimits {
            moisture_low_pct: Some(20.0),
            moisture_high_pct: Some(24.5),
            uncertainty_max_pct: None,
            basis: LimitBasis::Dry,
        }
    }

    #[test]
    fn limits_mark_readings_outside_and_refuse_a_swapped_band() {
        let a = AlarmLimits {
            moisture_low_pct: Some(12.0),
            moisture_high_pct: Some(15.5),
            uncertainty_max_pct: Some(1.0),
            basis: LimitBasis::Wet,
        };
        assert_eq!(a.check(Some(16.0), 0.5), ["HIGH"]);
        assert_eq!(a.check(Some(11.0), 1.5), ["LOW", "UNCERTAIN"]);
        assert!(a.check(Some(13.0), 0.5).is_empty());
        assert_eq!(a.check(None, f32::NAN), ["UNCERTAIN"]);
        assert_eq!(
            a.describe("HIGH", Some(16.2), 0.5),
            "moisture 16.20 % above the high limit 15.50 %"
        );
        assert!(a.validate().is_ok());
        let swapped = AlarmLimits {
            moisture_low_pct: Some(15.0),
            moisture_high_pct: Some(12.0),
            ..a
        };
        assert_eq!(swapped.validate().unwrap_err().key, "moisture_low_pct");
        let over = AlarmLimits {
            uncertainty_max_pct: Some(1200.0),
            ..a
        };
        assert_eq!(over.validate().unwrap_err().value, "1200");
        let negative = AlarmLimits {
            moisture_low_pct: Some(-1.0),
            ..a
        };
        assert_eq!(negative.validate().unwrap_err().key, "moisture_low_pct");
        // A wet-basis limit written in per mille is caught.
        let per_mille = AlarmLimits {
            moisture_high_pct: Some(155.0),
            ..a
        };
        let e = per_mille.validate().unwrap_err();
        assert!(
            e.key == "moisture_high_pct" && e.rule.contains("0..=100 %"),
            "{e:?}"
        );
        // Green wood on a dry basis (water above the dry mass): a band above
        // 100 %, said so.
        let green_wood = AlarmLimits {
            moisture_low_pct: Some(60.0),
            moisture_high_pct: Some(140.0),
            uncertainty_max_pct: Some(8.0),
            basis: LimitBasis::Dry,
        };
        assert!(green_wood.validate().is_ok());
        assert_eq!(green_wood.check(Some(150.0), 3.0), ["HIGH"]);
        let over = AlarmLimits {
            moisture_high_pct: Some(400.0),
            ..green_wood
        };
        assert_eq!(over.validate().unwrap_err().value, "400");
        // In a line file's table.
        let parsed: AlarmLimits =
            toml::from_str("basis = \"dry\"\nmoisture_high_pct = 140.0\n").unwrap();
        assert_eq!(parsed.basis, LimitBasis::Dry);
        assert!(toml::from_str::<AlarmLimits>("basis = \"wet basis\"\n").is_err());
        // A wet-basis band for dry-basis readings, and back: 20 % wet basis
        // is 25 % dry (water 20 of 100 g, dry matter 80 g).
        let wet = AlarmLimits {
            moisture_low_pct: Some(20.0),
            moisture_high_pct: Some(50.0),
            uncertainty_max_pct: Some(1.0),
            basis: LimitBasis::Wet,
        };
        let dry = wet.on_basis(LimitBasis::Dry).unwrap();
        assert_eq!(
            (
                dry.moisture_low_pct,
                dry.moisture_high_pct,
                dry.uncertainty_max_pct,
                dry.basis
            ),
            (Some(25.0), Some(100.0), Some(1.0), LimitBasis::Dry)
        );
        let back = dry.on_basis(LimitBasis::Wet).unwrap();
        assert_eq!(
            (back.moisture_low_pct, back.moisture_high_pct),
            (Some(20.0), Some(50.0))
        );
        assert_eq!(wet.on_basis(LimitBasis::Wet), None);
        // Readings on the other basis are converted to the band's, the
        // uncertainty with them: 22 % dry basis is 18.03 % wet (above the
        // band 12..15.5: HIGH); 16 % dry is 13.79 % wet (inside); an
        // uncertainty of 1.3 % dry at 16 % is 1.3 x 10^4 / 116^2 = 0.966 %
        // wet (within 1.0), 1.4 % dry is 1.040 % (UNCERTAIN).
        let dry = Some(LimitBasis::Dry);
        assert_eq!(a.check_reading(Some(22.0), 0.5, dry), ["HIGH"]);
        assert!(a.check_reading(Some(16.0), 1.3, dry).is_empty());
        assert_eq!(a.check_reading(Some(16.0), 1.4, dry), ["UNCERTAIN"]);
        // Unconverted, 16 % dry would be HIGH on the wet band.
        assert_eq!(a.check(Some(16.0), 1.3), ["HIGH", "UNCERTAIN"]);
        assert_eq!(
            a.check_reading(Some(16.0), 1.3, None),
            ["HIGH", "UNCERTAIN"]
        );
        // A wet reading against a dry band: 20 % wet is 25 % dry.
        assert_eq!(
            dry_band().check_reading(Some(20.0), 0.1, Some(LimitBasis::Wet)),
            ["HIGH"]
        );
        assert!(dry_band()
            .check_reading(Some(19.0), 0.1, Some(LimitBasis::Wet))
            .is_empty());
        // Said on the band's basis, with the reading as it came: 22 % dry
        // is 18.03 % wet (100 x 22 / 122).
        assert_eq!(
            a.describe_reading("HIGH", Some(22.0), 0.5, dry),
            "moisture 18.03 % wet basis above the high limit 15.50 % wet basis (the reading: 22.00 % +- 0.50 % dry basis)"
        );
        assert_eq!(
            a.describe_reading("HIGH", Some(16.0), 0.5, Some(LimitBasis::Wet)),
            a.describe("HIGH", Some(16.0), 0.5)
        );
    }
}
