//! Concentration units and conversion between them.
//!
//! Three families: mass per mass (g/kg, mg/kg, µg/kg, ng/g, µg/g, ng/kg,
//! %), mass per volume (g/L, mg/L, µg/L, ng/L; water), and parts per
//! million, billion, trillion, which mean mg/kg, µg/kg, ng/kg in soil and
//! mg/L, µg/L, ng/L in (dilute) water, and nothing definite when the matrix
//! is not known. Mass per mass never converts to mass per volume: that needs
//! a density, which a record does not carry.
//!
//! Spelling: `µ` may be the micro sign (U+00B5), the Greek mu (U+03BC) or
//! `u`; letters are matched without regard to case (`mg/l`, `MG/L`); spaces
//! are ignored (`mg / L`).
//!
//! Every factor between two units is a power of ten, applied as one exact
//! multiplication or one division by an exact power of ten, so a conversion
//! is correctly rounded and converting to the same unit returns the value
//! bit for bit.

use std::fmt;

use thiserror::Error;

/// What a sample is, which decides what ppm, ppb and ppt mean.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Matrix {
    /// Soil or sediment: ppm = mg/kg.
    Soil,
    /// Water: ppm = mg/L.
    Water,
    /// Not configured: ppm, ppb and ppt are ambiguous.
    #[default]
    Unknown,
}

impl fmt::Display for Matrix {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Matrix::Soil => "a soil series",
            Matrix::Water => "a water series",
            Matrix::Unknown => "a series whose matrix is not set",
        })
    }
}

/// Why a value cannot be expressed in the unit asked for.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum UnitError {
    /// The unit is not in the table.
    #[error("unit `{unit}` is not known; known units are {KNOWN}")]
    Unknown {
        /// The unit as written.
        unit: String,
    },
    /// ppm, ppb or ppt for a series whose matrix is not set.
    #[error(
        "{unit} is ambiguous for a series whose matrix is not set ({soil} in soil, {water} in water); set the series' matrix to soil or water, or write {soil} or {water}"
    )]
    Ambiguous {
        /// The unit as written.
        unit: String,
        /// What it means in soil.
        soil: &'static str,
        /// What it means in water.
        water: &'static str,
    },
    /// Mass per mass to mass per volume, or the reverse.
    #[error(
        "unit `{from}` cannot be converted to {to} for {matrix}; check the unit, or the series' matrix and unit in the config"
    )]
    Unconvertible {
        /// The unit converted from, as written.
        from: String,
        /// The unit converted to, as written.
        to: String,
        /// The series' matrix.
        matrix: Matrix,
    },
    /// The converted value is beyond the range of a double.
    #[error("{value} {from} is too large to express in {to}")]
    OutOfRange {
        /// The value, as a number.
        value: String,
        /// The unit converted from.
        from: String,
        /// The unit converted to.
        to: String,
    },
}

const KNOWN: &str =
    "g/kg, mg/kg, µg/kg, ng/g, µg/g, ng/kg, %, g/L, mg/L, µg/L, ng/L, ppm, ppb, ppt";

/// A record's value (or a non-detect's limit) from unit `from` in unit
/// `to`, refused rather than quietly turned into 0 when it is too small to
/// express there. The message says what is wrong and what to do.
pub fn convert_measure(
    y: super::Measure,
    from: &str,
    to: &str,
    matrix: Matrix,
) -> Result<super::Measure, String> {
    use super::Measure;
    let one = |v: f64| {
        let converted = convert(v, from, to, matrix).map_err(|e| e.to_string())?;
        if v != 0.0 && converted == 0.0 {
            return Err(format!(
                "{v} {from} is too small to express in {to} (it would become 0); check the value and its unit"
            ));
        }
        Ok(converted)
    };
    Ok(match y {
        Measure::Detected(v) => Measure::Detected(one(v)?),
        Measure::NonDetect { limit } => Measure::NonDetect { limit: one(limit)? },
    })
}

/// Converts `value` from unit `from` to unit `to` for a series of `matrix`.
///
/// The same unit (however spelled) returns `value` unchanged, even ppm for
/// an unknown matrix.
pub fn convert(value: f64, from: &str, to: &str, matrix: Matrix) -> Result<f64, UnitError> {
    if from == to {
        return Ok(value);
    }
    let f = Unit::parse(from).ok_or_else(|| UnitError::Unknown {
        unit: from.trim().to_string(),
    })?;
    let t = Unit::parse(to).ok_or_else(|| UnitError::Unknown {
        unit: to.trim().to_string(),
    })?;
    if f == t {
        return Ok(value);
    }
    let (from_family, from_exp) = f.resolve(matrix, from)?;
    let (to_family, to_exp) = t.resolve(matrix, to)?;
    if from_family != to_family {
        return Err(UnitError::Unconvertible {
            from: from.trim().to_string(),
            to: to.trim().to_string(),
            matrix,
        });
    }
    let converted = scale(value, from_exp - to_exp);
    if converted.is_finite() {
        Ok(converted)
    } else {
        Err(UnitError::OutOfRange {
            value: value.to_string(),
            from: from.trim().to_string(),
            to: to.trim().to_string(),
        })
    }
}

/// Whether `unit` is in the table, however spelled (for checking a
/// configuration, and for the unit a series' records set).
pub fn is_known(unit: &str) -> bool {
    Unit::parse(unit).is_some()
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Family {
    /// Mass per mass; exponent relative to mg/kg.
    MassPerMass,
    /// Mass per volume; exponent relative to mg/L.
    MassPerVolume,
    /// Parts per ...; exponent relative to ppm.
    Parts,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Unit {
    family: Family,
    /// Power of ten relative to the family's base unit.
    exp: i32,
}

/// Normalised spelling (lowercase, `u` for micro, no spaces) -> unit.
const TABLE: [(&[u8], Family, i32); 14] = [
    (b"g/kg", Family::MassPerMass, 3),
    (b"mg/kg", Family::MassPerMass, 0),
    (b"ug/kg", Family::MassPerMass, -3),
    (b"ng/g", Family::MassPerMass, -3),
    (b"ug/g", Family::MassPerMass, 0),
    (b"ng/kg", Family::MassPerMass, -6),
    (b"%", Family::MassPerMass, 4),
    (b"g/l", Family::MassPerVolume, 3),
    (b"mg/l", Family::MassPerVolume, 0),
    (b"ug/l", Family::MassPerVolume, -3),
    (b"ng/l", Family::MassPerVolume, -6),
    (b"ppm", Family::Parts, 0),
    (b"ppb", Family::Parts, -3),
    (b"ppt", Family::Parts, -6),
];

impl Unit {
    fn parse(text: &str) -> Option<Unit> {
        let mut buf = [0u8; 8];
        let mut n = 0;
        for c in text.chars() {
            let b = match c {
                ' ' | '\t' => continue,
                '\u{b5}' | '\u{3bc}' => b'u',
                c if c.is_ascii() => (c as u8).to_ascii_lowercase(),
                _ => return None,
            };
            *buf.get_mut(n)? = b;
            n += 1;
        }
        let name = buf.get(..n)?;
        TABLE
            .iter()
            .find(|(spelling, _, _)| *spelling == name)
            .map(|&(_, family, exp)| Unit { family, exp })
    }

    /// The unit's family and exponent once the matrix is known.
    fn resolve(self, matrix: Matrix, written: &str) -> Result<(Family, i32), UnitError> {
        if self.family != Family::Parts {
            return Ok((self.family, self.exp));
        }
        match matrix {
            Matrix::Soil => Ok((Family::MassPerMass, self.exp)),
            Matrix::Water => Ok((Family::MassPerVolume, self.exp)),
            Matrix::Unknown => {
                let (soil, water) = match self.exp {
                    0 => ("mg/kg", "mg/L"),
                    -3 => ("µg/kg", "µg/L"),
                    _ => ("ng/kg", "ng/L"),
                };
                Err(UnitError::Ambiguous {
                    unit: written.trim().to_string(),
                    soil,
                    water,
                })
            }
        }
    }
}

/// `value * 10^exp`, correctly rounded for the exponents in the table.
fn scale(value: f64, exp: i32) -> f64 {
    // Powers of ten up to 1e22 are exact doubles.
    const POW10: [f64; 23] = [
        1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
        1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
    ];
    let power = POW10
        .get(exp.unsigned_abs() as usize)
        .copied()
        .unwrap_or(f64::INFINITY);
    match exp {
        0 => value,
        e if e > 0 => value * power,
        _ => value / power,
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn same_unit_returns_the_value_bit_for_bit() {
        let v = 0.1 + 0.2;
        for (from, to) in [
            ("mg/L", "mg/L"),
            ("mg/l", "MG/L"),
            ("µg/L", "ug/L"),
            ("ppm", "ppm"),
        ] {
            let out = convert(v, from, to, Matrix::Unknown).unwrap();
            assert_eq!(out.to_bits(), v.to_bits(), "{from} -> {to}");
        }
        // Equal factors: ng/g is µg/kg.
        assert_eq!(
            convert(v, "ng/g", "µg/kg", Matrix::Soil).unwrap().to_bits(),
            v.to_bits()
        );
    }

    #[test]
    fn converts_within_mass_per_mass() {
        assert_eq!(convert(0.5, "mg/kg", "µg/kg", Matrix::Soil).unwrap(), 500.0);
        assert_eq!(convert(500.0, "ug/kg", "mg/kg", Matrix::Soil).unwrap(), 0.5);
        assert_eq!(convert(1.0, "%", "mg/kg", Matrix::Soil).unwrap(), 10_000.0);
        assert_eq!(convert(2.0, "g/kg", "%", Matrix::Soil).unwrap(), 0.2);
        assert_eq!(
            convert(7.0, "ng/kg", "µg/kg", Matrix::Unknown).unwrap(),
            0.007
        );
    }

    #[test]
    fn converts_within_mass_per_volume_whatever_the_micro_sign() {
        assert_eq!(
            convert(0.5, "mg/L", "\u{b5}g/L", Matrix::Water).unwrap(),
            500.0
        );
        assert_eq!(
            convert(0.5, "mg/l", "\u{3bc}g/l", Matrix::Water).unwrap(),
            500.0
        );
        assert_eq!(convert(250.0, "ng/L", "ug/L", Matrix::Water).unwrap(), 0.25);
        assert_eq!(
            convert(1.5, "g / L", "mg/L", Matrix::Water).unwrap(),
            1500.0
        );
    }

    #[test]
    fn parts_per_follow_the_matrix() {
        assert_eq!(convert(3.0, "ppm", "mg/kg", Matrix::Soil).unwrap(), 3.0);
        assert_eq!(convert(3.0, "ppb", "mg/kg", Matrix::Soil).unwrap(), 0.003);
        assert_eq!(convert(3.0, "ppm", "µg/L", Matrix::Water).unwrap(), 3000.0);
        assert_eq!(convert(3.0, "ppt", "ng/L", Matrix::Water).unwrap(), 3.0);
        assert_eq!(convert(3.0, "mg/L", "ppb", Matrix::Water).unwrap(), 3000.0);
    }

    #[test]
    fn parts_per_are_ambiguous_without_a_matrix() {
        let err = convert(3.0, "ppm", "mg/kg", Matrix::Unknown).unwrap_err();
        assert!(matches!(err, UnitError::Ambiguous { .. }));
        assert!(
            err.to_string()
                .starts_with("ppm is ambiguous for a series whose matrix is not set (mg/kg in soil, mg/L in water)"),
            "{err}"
        );
        assert!(convert(3.0, "ppb", "ppm", Matrix::Unknown).is_err());
    }

    #[test]
    fn refuses_mass_per_mass_to_mass_per_volume() {
        let err = convert(3.0, "ppm", "mg/L", Matrix::Soil).unwrap_err();
        assert_eq!(
            err.to_string(),
            "unit `ppm` cannot be converted to mg/L for a soil series; check the unit, or the series' matrix and unit in the config"
        );
        assert!(matches!(
            convert(3.0, "mg/kg", "mg/L", Matrix::Water),
            Err(UnitError::Unconvertible { .. })
        ));
        assert!(matches!(
            convert(3.0, "ppb", "µg/kg", Matrix::Water),
            Err(UnitError::Unconvertible { .. })
        ));
    }

    #[test]
    fn refuses_unknown_units() {
        for bad in ["mg/m3", "furlongs", "mg/kg dw", "", "µµg/L"] {
            assert!(
                matches!(
                    convert(1.0, bad, "mg/L", Matrix::Water),
                    Err(UnitError::Unknown { .. })
                ),
                "{bad}"
            );
            assert!(!is_known(bad), "{bad}");
        }
        assert!(is_known("MG/KG"));
    }

    #[test]
    fn overflow_is_an_error_not_infinity() {
        assert!(matches!(
            convert(1e305, "g/kg", "ng/kg", Matrix::Soil),
            Err(UnitError::OutOfRange { .. })
        ));
    }
}
