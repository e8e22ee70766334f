//! Option value checks shared by the subcommands, run by clap while it parses the
//! command line, so a bad value is refused before any file is read or model loaded.
//! Input: the option text. Output: the typed value, or a message saying what range
//! is allowed. Never touches files.

/// A whole number of at least 1 (counts such as `--max-answers`, `--resamples`).
pub fn at_least_one(s: &str) -> Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(0) => Err("must be at least 1 (leave the option out for no limit)".into()),
        Ok(n) => Ok(n),
        Err(_) => Err(format!("`{s}` is not a whole number")),
    }
}

/// A probability, 0 to 1 inclusive (`--low-mass`).
pub fn probability(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if (0.0..=1.0).contains(&v) {
        Ok(v)
    } else {
        Err(format!(
            "`{s}` is not a probability; use a value from 0 to 1"
        ))
    }
}

/// A share above 0 and at most 1 (`--label-share`).
pub fn share(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if v > 0.0 && v <= 1.0 {
        Ok(v)
    } else {
        Err(format!(
            "`{s}` is not a share; use a value above 0 and at most 1, such as 0.3"
        ))
    }
}

/// An interval coverage strictly between 0 and 1 (`--level`).
pub fn level(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if v > 0.0 && v < 1.0 {
        Ok(v)
    } else {
        Err(format!(
            "`{s}` is not a coverage; use a value between 0 and 1, such as 0.95"
        ))
    }
}

/// Kernel threads: 0 (all cores) up to the number of logical cores.
pub fn threads(s: &str) -> Result<usize, String> {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    match s.trim().parse::<usize>() {
        Ok(n) if n <= cores => Ok(n),
        Ok(n) => Err(format!(
            "{n} threads on a machine with {cores} logical cores; use 0 (all cores) up to {cores}"
        )),
        Err(_) => Err(format!("`{s}` is not a whole number")),
    }
}

fn number(s: &str) -> Result<f64, String> {
    s.trim()
        .parse::<f64>()
        .ok()
        .filter(|v| v.is_finite())
        .ok_or_else(|| format!("`{s}` is not a number"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn out_of_range_values_are_refused_with_the_allowed_range() {
        assert!(at_least_one("0").unwrap_err().contains("at least 1"));
        assert_eq!(at_least_one("3"), Ok(3));
        assert!(probability("2").unwrap_err().contains("from 0 to 1"));
        assert_eq!(probability("0.5"), Ok(0.5));
        assert!(share("1.5").is_err() && share("0").is_err());
        assert_eq!(share("1"), Ok(1.0));
        assert!(level("1").is_err() && level("nan").is_err());
        assert!(threads("100000").unwrap_err().contains("logical cores"));
        assert_eq!(threads("0"), Ok(0));
    }
}
