//! Shards: a deterministic share of a job's units, so one run can be split across
//! machines and joined again with `assize merge`. Input: `--shard K/N` (K from 0) or
//! the scheduler's environment. Output: which units this process takes. A unit goes
//! to shard `hash(unit key) mod N`, so shards are balanced and a unit never moves
//! when others are added. Never depends on unit order or on the machine.

use std::fmt;

use sha2::{Digest, Sha256};

/// Shard `index` of `count` (0-based index).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// This shard, from 0.
    pub index: usize,
    /// How many shards the run is split into.
    pub count: usize,
}

impl fmt::Display for Shard {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

/// Environment variables holding a scheduler's task index and count.
const KUBERNETES_INDEX: &str = "JOB_COMPLETION_INDEX";
const SLURM_ID: &str = "SLURM_ARRAY_TASK_ID";
const SLURM_MIN: &str = "SLURM_ARRAY_TASK_MIN";
const SLURM_COUNT: &str = "SLURM_ARRAY_TASK_COUNT";

impl Shard {
    /// Whether this shard takes the unit with this key.
    pub fn takes(&self, key: &str) -> bool {
        let h = Sha256::digest(key.as_bytes());
        let n = u64::from_be_bytes(h[..8].try_into().expect("8 bytes"));
        n % self.count as u64 == self.index as u64
    }

    /// Parse `K/N`, `env/N` or `env`; `env` reads the index (and, for Slurm, the
    /// count) from the scheduler through `var`.
    pub fn parse_with(s: &str, var: impl Fn(&str) -> Option<String>) -> Result<Shard, String> {
        let (k, n) = match s.split_once('/') {
            Some((k, n)) => (k, Some(n)),
            None => (s, None),
        };
        let count = match n {
            Some(n) => number(n, "shard count")?,
            None if k == "env" => match var(SLURM_COUNT) {
                Some(c) => number(&c, SLURM_COUNT)?,
                None => return Err(format!("`--shard env` needs `{SLURM_COUNT}` (Slurm job arrays); elsewhere give the count: `--shard env/N`")),
            },
            None => return Err(format!("`{s}` is not `K/N`")),
        };
        let index = if k == "env" {
            from_env(&var)?
        } else {
            number(k, "shard index")?
        };
        if count == 0 || index >= count {
            return Err(format!(
                "shard {index}/{count} does not exist: the index runs from 0 to N-1"
            ));
        }
        Ok(Shard { index, count })
    }

    /// Parse with the process environment.
    pub fn parse(s: &str) -> Result<Shard, String> {
        Self::parse_with(s, |k| std::env::var(k).ok())
    }
}

fn number(s: &str, what: &str) -> Result<usize, String> {
    s.trim()
        .parse()
        .map_err(|_| format!("{what} `{s}` is not a whole number"))
}

/// The task index from Kubernetes Indexed Jobs or Slurm job arrays (made 0-based).
fn from_env(var: &impl Fn(&str) -> Option<String>) -> Result<usize, String> {
    if let Some(i) = var(KUBERNETES_INDEX) {
        return number(&i, KUBERNETES_INDEX);
    }
    if let Some(i) = var(SLURM_ID) {
        let id = number(&i, SLURM_ID)?;
        let min = var(SLURM_MIN).map_or(Ok(0), |m| number(&m, SLURM_MIN))?;
        return id
            .checked_sub(min)
            .ok_or_else(|| format!("`{SLURM_ID}` {id} is below `{SLURM_MIN}` {min}"));
    }
    Err(format!(
        "`--shard env` found neither `{KUBERNETES_INDEX}` (Kubernetes Indexed Job) nor `{SLURM_ID}` (Slurm job array)"
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn env<'a>(pairs: &'a [(&'a str, &'a str)]) -> impl Fn(&str) -> Option<String> + 'a {
        move |k| {
            pairs
                .iter()
                .find(|(n, _)| *n == k)
                .map(|(_, v)| v.to_string())
        }
    }

    #[test]
    fn every_key_goes_to_exactly_one_shard() {
        for key in ["q1/a", "q2/b", "q17/system-x", ""] {
            let owners: Vec<usize> = (0..5)
                .filter(|&i| Shard { index: i, count: 5 }.takes(key))
                .collect();
            assert_eq!(owners.len(), 1, "{key}");
        }
    }

    /// Balance is a property of the hash: 10,000 keys over 4 shards stay within 5%
    /// of an even split (binomial sd is 0.43%, so 5% is over ten sd).
    #[test]
    fn shards_are_balanced() {
        let mut n = [0usize; 4];
        for i in 0..10_000 {
            let key = format!("q{i}/system-{}", i % 3);
            let s = (0..4)
                .find(|&s| Shard { index: s, count: 4 }.takes(&key))
                .expect("one owner");
            n[s] += 1;
        }
        for c in n {
            assert!((2375..=2625).contains(&c), "{n:?}");
        }
    }

    #[test]
    fn scheduler_environment_gives_the_index() {
        let k8s = [("JOB_COMPLETION_INDEX", "3")];
        assert_eq!(
            Shard::parse_with("env/8", env(&k8s)),
            Ok(Shard { index: 3, count: 8 })
        );
        let slurm = [
            ("SLURM_ARRAY_TASK_ID", "5"),
            ("SLURM_ARRAY_TASK_MIN", "1"),
            ("SLURM_ARRAY_TASK_COUNT", "6"),
        ];
        assert_eq!(
            Shard::parse_with("env", env(&slurm)),
            Ok(Shard { index: 4, count: 6 })
        );
        assert!(
            Shard::parse_with("env", env(&k8s)).is_err(),
            "Kubernetes needs the count"
        );
        assert!(Shard::parse_with("env/2", env(&[])).is_err());
    }

    #[test]
    fn bad_shards_are_refused() {
        for s in ["4/4", "1/0", "x/2", "3", "-1/2"] {
            assert!(Shard::parse_with(s, env(&[])).is_err(), "{s}");
        }
    }
}
