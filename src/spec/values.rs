//! Spec values that take more than one shape ("number or `estimate`", "name
//! or box"), each with a small visitor so errors say what is expected.

use std::fmt;

use serde::Deserialize;
use serde::de::{self, Deserializer, SeqAccess, Visitor};

/// `[actions] offset`: seconds, or `"estimate"`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum OffsetValue {
    /// A fixed offset in seconds.
    Seconds(f64),
    /// Estimate per clip from motion/action cross-correlation.
    Estimate,
}

impl<'de> Deserialize<'de> for OffsetValue {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl Visitor<'_> for V {
            type Value = OffsetValue;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a number of seconds or the string \"estimate\"")
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<Self::Value, E> {
                Ok(OffsetValue::Seconds(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<Self::Value, E> {
                Ok(OffsetValue::Seconds(v as f64))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Self::Value, E> {
                if v == "estimate" {
                    Ok(OffsetValue::Estimate)
                } else {
                    Err(E::invalid_value(de::Unexpected::Str(v), &self))
                }
            }
        }
        d.deserialize_any(V)
    }
}

/// `[decode] crop`: `"center"`, `"none"` or `[x, y, w, h]`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CropValue {
    /// Centre crop.
    Center,
    /// Pad, no crop.
    None,
    /// A fixed box.
    Box([i64; 4]),
}

impl<'de> Deserialize<'de> for CropValue {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = CropValue;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("\"center\", \"none\" or a box [x, y, width, height]")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Self::Value, E> {
                match v {
                    "center" => Ok(CropValue::Center),
                    "none" => Ok(CropValue::None),
                    _ => Err(E::invalid_value(de::Unexpected::Str(v), &self)),
                }
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
                let mut b = [0i64; 4];
                for (i, slot) in b.iter_mut().enumerate() {
                    *slot = seq
                        .next_element()?
                        .ok_or_else(|| de::Error::invalid_length(i, &self))?;
                }
                if seq.next_element::<i64>()?.is_some() {
                    return Err(de::Error::invalid_length(5, &self));
                }
                Ok(CropValue::Box(b))
            }
        }
        d.deserialize_any(V)
    }
}
