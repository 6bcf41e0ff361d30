//! The row codec: the store's own [`Value`] to a PostgreSQL column and
//! back, without loss.
//!
//! | `Value`   | column types                      | read back as |
//! | --------- | --------------------------------- | ------------ |
//! | `Null`    | any (SQL NULL)                    | `Null`       |
//! | `Integer` | `bigint`, `integer`, `smallint`   | `Integer`    |
//! | `Real`    | `double precision` (binary, bits) | `Real`       |
//! | `Text`    | `text`                            | `Text`       |
//! | `Blob`    | `bytea`                           | `Blob`       |
//!
//! Values travel in PostgreSQL's binary format, so a float keeps its bits
//! (NaN and -0.0 included). An integer that does not fit a narrower column
//! and text holding a NUL character (which PostgreSQL text cannot store) are
//! refused, never altered.

use std::error::Error;

use bytes::BytesMut;
use fringe_store::Value;
use postgres::types::{to_sql_checked, FromSql, IsNull, ToSql, Type};

type BoxError = Box<dyn Error + Sync + Send>;

/// A store value bound as a parameter or a COPY field.
#[derive(Debug)]
pub struct Bind<'a>(pub &'a Value);

fn kind(v: &Value) -> &'static str {
    match v {
        Value::Null => "NULL",
        Value::Integer(_) => "integer",
        Value::Real(_) => "real",
        Value::Text(_) => "text",
        Value::Blob(_) => "blob",
    }
}

impl ToSql for Bind<'_> {
    fn to_sql(&self, ty: &Type, out: &mut BytesMut) -> Result<IsNull, BoxError> {
        match (self.0, ty) {
            (Value::Null, _) => Ok(IsNull::Yes),
            (Value::Integer(i), &Type::INT8) => i.to_sql(ty, out),
            (Value::Integer(i), &Type::INT4) => i32::try_from(*i)
                .map_err(|_| format!("{i} does not fit an integer column"))?
                .to_sql(ty, out),
            (Value::Integer(i), &Type::INT2) => i16::try_from(*i)
                .map_err(|_| format!("{i} does not fit a smallint column"))?
                .to_sql(ty, out),
            (Value::Real(x), &Type::FLOAT8) => x.to_sql(ty, out),
            (Value::Text(s), &Type::TEXT | &Type::VARCHAR) => {
                if s.contains('\0') {
                    return Err(format!(
                        "text {s:?} holds a NUL character, which PostgreSQL text cannot store"
                    )
                    .into());
                }
                s.as_str().to_sql(ty, out)
            }
            (Value::Blob(b), &Type::BYTEA) => b.as_slice().to_sql(ty, out),
            (v, ty) => Err(format!("a {} value cannot go into a {ty} column", kind(v)).into()),
        }
    }

    fn accepts(ty: &Type) -> bool {
        matches!(
            *ty,
            Type::INT2
                | Type::INT4
                | Type::INT8
                | Type::FLOAT8
                | Type::TEXT
                | Type::VARCHAR
                | Type::BYTEA
        )
    }

    to_sql_checked!();
}

/// A column read back as a store value.
#[derive(Debug, Clone, PartialEq)]
pub struct Got(pub Value);

impl<'a> FromSql<'a> for Got {
    fn from_sql(ty: &Type, raw: &'a [u8]) -> Result<Self, BoxError> {
        Ok(Got(match *ty {
            Type::INT8 => Value::Integer(i64::from_sql(ty, raw)?),
            Type::INT4 => Value::Integer(i64::from(i32::from_sql(ty, raw)?)),
            Type::INT2 => Value::Integer(i64::from(i16::from_sql(ty, raw)?)),
            Type::FLOAT8 => Value::Real(f64::from_sql(ty, raw)?),
            Type::BYTEA => Value::Blob(<&[u8]>::from_sql(ty, raw)?.to_vec()),
            _ => Value::Text(<&str>::from_sql(ty, raw)?.to_owned()),
        }))
    }

    fn from_sql_null(_: &Type) -> Result<Self, BoxError> {
        Ok(Got(Value::Null))
    }

    fn accepts(ty: &Type) -> bool {
        <Bind<'_> as ToSql>::accepts(ty)
    }
}

/// The first text among `values` that PostgreSQL cannot store (it holds a
/// NUL character), as its index.
pub fn nul_text(values: &[Value]) -> Option<usize> {
    values
        .iter()
        .position(|v| matches!(v, Value::Text(s) if s.contains('\0')))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn encode(v: &Value, ty: &Type) -> Result<Option<Vec<u8>>, BoxError> {
        let mut out = BytesMut::new();
        Ok(match Bind(v).to_sql_checked(ty, &mut out)? {
            IsNull::Yes => None,
            IsNull::No => Some(out.to_vec()),
        })
    }

    fn round_trip(v: &Value, ty: &Type) -> Value {
        match encode(v, ty).unwrap() {
            None => Got::from_sql_null(ty).unwrap().0,
            Some(bytes) => Got::from_sql(ty, &bytes).unwrap().0,
        }
    }

    #[test]
    fn values_come_back_bit_for_bit() {
        for x in [0.0, -0.0, f64::NAN, -f64::NAN, f64::INFINITY, 5e-324, 14.25] {
            let back = round_trip(&Value::Real(x), &Type::FLOAT8);
            match back {
                Value::Real(y) => assert_eq!(y.to_bits(), x.to_bits(), "{x}"),
                other => panic!("{other:?}"),
            }
        }
        for (v, ty) in [
            (Value::Integer(i64::MIN), Type::INT8),
            (Value::Integer(i64::MAX), Type::INT8),
            (Value::Integer(65_535), Type::INT4),
            (Value::Integer(1), Type::INT2),
            (Value::Text(String::new()), Type::TEXT),
            (Value::Text("Feuchte 14,2 % – Weizen".into()), Type::TEXT),
            (Value::Blob(vec![]), Type::BYTEA),
            (Value::Blob(vec![0, 255, 7]), Type::BYTEA),
            (Value::Null, Type::FLOAT8),
        ] {
            assert_eq!(round_trip(&v, &ty), v, "{ty}");
        }
    }

    #[test]
    fn what_postgres_cannot_hold_is_refused_not_altered() {
        assert!(encode(&Value::Text("a\0b".into()), &Type::TEXT).is_err());
        assert!(encode(&Value::Integer(70_000), &Type::INT2).is_err());
        assert!(encode(&Value::Integer(1 << 40), &Type::INT4).is_err());
        assert!(encode(&Value::Real(1.0), &Type::INT8).is_err());
        assert_eq!(
            nul_text(&[Value::Text("ok".into()), Value::Text("x\0".into())]),
            Some(1)
        );
    }
}
