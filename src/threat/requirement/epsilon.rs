//! Epsilon lists as written on the command line or in a requirement file: one number, a comma list or
//! an inclusive range. Every value returned is finite and ≥ 0, a range has at most 1000 values, and a
//! malformed list is an error naming its flag or field.

use super::{invalid, RequirementError};

/// Parses an epsilon list: one number, a comma list `0.01,0.02,0.05`, or a range `start:stop:step`
/// (inclusive of `stop` up to rounding). `place` names the flag or field for errors.
pub fn parse_epsilon_list(text: &str, place: &str) -> Result<Vec<f64>, RequirementError> {
    let number = |t: &str| -> Result<f64, RequirementError> {
        let v: f64 = t
            .trim()
            .parse()
            .map_err(|_| invalid(place, format!("\"{}\" is not a number", t.trim())))?;
        if !v.is_finite() || v < 0.0 {
            return Err(invalid(
                place,
                format!("{v} is not allowed, expected a finite number ≥ 0"),
            ));
        }
        Ok(v)
    };
    let text = text.trim();
    if text.contains(':') {
        let parts: Vec<&str> = text.split(':').collect();
        if parts.len() != 3 {
            return Err(invalid(
                place,
                format!(
                    "\"{text}\" is not a range, expected start:stop:step (e.g. 0.01:0.05:0.01)"
                ),
            ));
        }
        let (start, stop, step) = (number(parts[0])?, number(parts[1])?, number(parts[2])?);
        if step <= 0.0 || stop < start {
            return Err(invalid(
                place,
                format!("range \"{text}\" needs step > 0 and stop ≥ start"),
            ));
        }
        let count = (((stop - start) / step + 1e-9).floor() as usize).saturating_add(1);
        if count > 1000 {
            return Err(invalid(
                place,
                format!("range \"{text}\" has {count} values, at most 1000 are allowed"),
            ));
        }
        return Ok((0..count).map(|k| start + k as f64 * step).collect());
    }
    text.split(',').map(number).collect()
}
