//! Range checks shared by every spec section: each records a problem with the
//! key, line and column and returns the default, so one pass lists them all.

use toml::Spanned;

use super::error::Problems;

/// An integer key in `1..=max`; the default when absent or out of range.
pub fn int_in(
    key: &str,
    v: &Option<Spanned<i64>>,
    default: u32,
    max: u32,
    p: &mut Problems<'_>,
) -> u32 {
    match v {
        None => default,
        Some(s) if *s.get_ref() < 1 || *s.get_ref() > max as i64 => {
            p.at(
                key,
                s.span(),
                format!("must be an integer from 1 to {max} (got {})", s.get_ref()),
            );
            default
        }
        Some(s) => *s.get_ref() as u32,
    }
}

/// A finite positive number; the default when absent or not allowed.
pub fn positive_f64(
    key: &str,
    v: &Option<Spanned<f64>>,
    default: f64,
    p: &mut Problems<'_>,
) -> f64 {
    match v {
        None => default,
        Some(s) if !(s.get_ref().is_finite() && *s.get_ref() > 0.0) => {
            p.at(
                key,
                s.span(),
                format!("must be a positive number (got {})", s.get_ref()),
            );
            default
        }
        Some(s) => *s.get_ref(),
    }
}

/// Resolves a section from spec text (for the sections' unit tests): the
/// options and every problem as text.
#[cfg(test)]
pub fn resolve_text<R: serde::de::DeserializeOwned, O>(
    text: &str,
    resolve: impl Fn(&R, &mut Problems<'_>) -> O,
) -> (O, Vec<String>) {
    let raw: R = toml::from_str(text).expect("section parses");
    let mut p = Problems::new(text);
    let o = resolve(&raw, &mut p);
    (o, p.list.iter().map(|x| x.to_string()).collect())
}
