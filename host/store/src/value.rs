//! The store's own value type: what every back end stores in a column and
//! what the hash chain encodes.
//!
//! Five kinds, as SQL databases store values (NULL, 64-bit integer, 64-bit
//! float, UTF-8 text, bytes). A back end maps its own types to these and
//! back without loss; the canonical form of a record ([`crate::record`])
//! is built from them, so any back end yields the same hashes.

/// One stored value.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    /// No value.
    Null,
    /// A signed 64-bit integer.
    Integer(i64),
    /// A 64-bit float (never NaN in a canonical record: NaN is stored as
    /// [`Value::Null`], see [`crate::record::real`]).
    Real(f64),
    /// UTF-8 text.
    Text(String),
    /// Bytes.
    Blob(Vec<u8>),
}

impl Value {
    /// The integer, if this is one (a real is truncated: rows written by
    /// fringe never hold a real where an integer belongs).
    pub fn as_i64(&self) -> Option<i64> {
        match self {
            Value::Integer(x) => Some(*x),
            Value::Real(x) => Some(*x as i64),
            _ => None,
        }
    }

    /// The text, if this is text.
    pub fn as_text(&self) -> Option<&str> {
        match self {
            Value::Text(s) => Some(s),
            _ => None,
        }
    }
}
