//! The command line's range syntax, one of pollard's own:
//!
//! | written | means |
//! | --- | --- |
//! | `4` | the one value 4 |
//! | `2,4,8,none` | these values; `none` is "no limit" (`max_depth`, `max_leaves`) |
//! | `lin(2,20,6)` | 2, 8, 14, 20: from 2 to 20 in steps of 6 |
//! | `log(0.001,0.1,3)` | 0.001, 0.01, 0.1: 3 values evenly spaced on a log scale |
//!
//! Spaces are ignored.

use crate::sweep::Range;

/// Parses one limit's range as written on the command line.
pub fn parse_range(text: &str) -> Result<Range, String> {
    let t: String = text.chars().filter(|c| !c.is_whitespace()).collect();
    let call = |name: &str| t.strip_prefix(name).and_then(|r| r.strip_prefix('(')).and_then(|r| r.strip_suffix(')'));
    if let Some(args) = call("lin") {
        let [from, to, step] = three(args, text)?;
        return Ok(Range::Span { from, to, step });
    }
    if let Some(args) = call("log") {
        let [from, to, count] = three(args, text)?;
        if count.fract() != 0.0 || count < 1.0 {
            return Err(format!("'{text}': the third value of log(from,to,count) is a count of values, a whole number >= 1"));
        }
        return Ok(Range::LogSpan { from, to, count: count as u32 });
    }
    if t.is_empty() {
        return Err("a range needs at least one value".into());
    }
    let values = t
        .split(',')
        .map(|v| match v {
            "none" => Ok(None),
            _ => v.parse::<f64>().map(Some).map_err(|_| format!("'{v}' in '{text}' is not a number or none (forms: 2,4,none  lin(2,20,6)  log(0.001,0.1,3))")),
        })
        .collect::<Result<Vec<_>, _>>()?;
    Ok(Range::Values(values))
}

fn three(args: &str, text: &str) -> Result<[f64; 3], String> {
    let v: Vec<&str> = args.split(',').collect();
    if v.len() != 3 {
        return Err(format!("'{text}' needs three numbers in the parentheses"));
    }
    let mut out = [0.0; 3];
    for (o, s) in out.iter_mut().zip(v) {
        *o = s.parse().map_err(|_| format!("'{s}' in '{text}' is not a number"))?;
    }
    Ok(out)
}

/// Writes a range back in the same syntax.
pub fn show_range(r: &Range) -> String {
    match r {
        Range::Values(v) => v.iter().map(|x| x.map_or("none".to_string(), |n| format!("{n}"))).collect::<Vec<_>>().join(","),
        Range::Span { from, to, step } => format!("lin({from},{to},{step})"),
        Range::LogSpan { from, to, count } => format!("log({from},{to},{count})"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn forms() {
        assert_eq!(parse_range("4").unwrap(), Range::Values(vec![Some(4.0)]));
        assert_eq!(parse_range("2, 4,none").unwrap(), Range::Values(vec![Some(2.0), Some(4.0), None]));
        assert_eq!(parse_range("lin(2,20,6)").unwrap(), Range::Span { from: 2.0, to: 20.0, step: 6.0 });
        assert_eq!(parse_range("log(0.001,0.1,3)").unwrap(), Range::LogSpan { from: 0.001, to: 0.1, count: 3 });
        assert!(parse_range("lin(2,20)").unwrap_err().contains("three numbers"));
        assert!(parse_range("log(1,10,2.5)").unwrap_err().contains("whole number"));
        assert!(parse_range("2,x").unwrap_err().contains("'x'"));
        assert!(parse_range("").is_err());
        for s in ["2,4,none", "lin(2,20,6)", "log(0.001,0.1,3)"] {
            assert_eq!(show_range(&parse_range(s).unwrap()), s);
        }
    }
}
