//! Shards: the k-th of n disjoint parts of a run's sorted input list, so one job
//! can spread over a scheduler's job array.
//!
//! Each input goes to the part chosen by a consistent hash of its relative path
//! (Lamping & Veach 2014, "A Fast, Minimal Memory, Consistent Hash Algorithm",
//! arXiv:1406.2294, Fig. 1). The choice depends on the path alone: adding files
//! never moves another file, and going from n to n+1 parts moves about 1/(n+1)
//! of them. The key is the first eight bytes of the path's SHA-256, so it is the
//! same on every machine and every run.

use std::fmt;
use std::str::FromStr;

use sha2::{Digest, Sha256};

use crate::error::Error;

/// Part `index` (1-based) of `count`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// 1 ≤ index ≤ count.
    pub index: usize,
    /// Number of parts.
    pub count: usize,
}

/// `--shard` as given: a fixed part, or read from the scheduler's variables.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ShardSpec {
    /// `K/N`.
    Fixed(Shard),
    /// `auto` or `auto/N`: index (and count) from the environment.
    Auto(Option<usize>),
}

impl FromStr for ShardSpec {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        let (a, b) = match s.split_once('/') {
            Some((a, b)) => (a.trim(), Some(b.trim())),
            None => (s.trim(), None),
        };
        let count = |b: &str| -> Result<usize, String> {
            match b.parse::<usize>() {
                Ok(n) if n >= 1 => Ok(n),
                _ => Err(format!("shard count '{b}' is not a whole number ≥ 1")),
            }
        };
        if a == "auto" {
            return Ok(ShardSpec::Auto(b.map(count).transpose()?));
        }
        let Some(b) = b else {
            return Err(format!("'{s}' is not K/N (e.g. 2/8), auto or auto/N"));
        };
        let n = count(b)?;
        match a.parse::<usize>() {
            Ok(k) if (1..=n).contains(&k) => Ok(ShardSpec::Fixed(Shard { index: k, count: n })),
            _ => Err(format!(
                "shard index '{a}' must be a whole number from 1 to {n}"
            )),
        }
    }
}

impl fmt::Display for Shard {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

impl Shard {
    /// The subfolder of `--out` this part writes to.
    pub fn folder(&self) -> String {
        format!("shard-{}-of-{}", self.index, self.count)
    }

    /// Whether the input with relative path `rel` (with `/`) belongs to this part.
    pub fn holds(&self, rel: &str) -> bool {
        part_of(rel, self.count) + 1 == self.index
    }

    /// Reads a folder name written by [`Shard::folder`].
    pub fn from_folder(name: &str) -> Option<Shard> {
        let rest = name.strip_prefix("shard-")?;
        let (k, n) = rest.split_once("-of-")?;
        let (index, count) = (k.parse().ok()?, n.parse().ok()?);
        ((1..=count).contains(&index)).then_some(Shard { index, count })
    }
}

/// The 0-based part of `count` that `rel` falls in.
pub fn part_of(rel: &str, count: usize) -> usize {
    let digest = Sha256::digest(rel.as_bytes());
    let key = u64::from_be_bytes(digest[..8].try_into().expect("eight bytes"));
    jump_hash(key, count)
}

/// Jump consistent hash (Lamping & Veach 2014, Fig. 1): maps `key` to a bucket in
/// `0..buckets`. Written here because it is eight lines and no crate of ours has it.
pub fn jump_hash(mut key: u64, buckets: usize) -> usize {
    let (mut b, mut j): (i64, i64) = (-1, 0);
    while j < buckets as i64 {
        b = j;
        key = key.wrapping_mul(2_862_933_555_777_941_757).wrapping_add(1);
        j = ((b + 1) as f64 * ((1u64 << 31) as f64 / ((key >> 33) + 1) as f64)) as i64;
    }
    b.max(0) as usize
}

/// Resolves `--shard` against the environment: Slurm job arrays
/// (`SLURM_ARRAY_TASK_ID`, `SLURM_ARRAY_TASK_MIN`, `SLURM_ARRAY_TASK_COUNT`) or
/// Kubernetes indexed jobs (`JOB_COMPLETION_INDEX`, 0-based, count from `auto/N`).
pub fn resolve(spec: ShardSpec, env: &dyn Fn(&str) -> Option<String>) -> Result<Shard, Error> {
    let given = match spec {
        ShardSpec::Fixed(s) => return Ok(s),
        ShardSpec::Auto(n) => n,
    };
    let num = |name: &str| -> Result<Option<usize>, Error> {
        match env(name) {
            None => Ok(None),
            Some(v) => v.trim().parse::<usize>().map(Some).map_err(|_| {
                Error::Usage(format!("--shard auto: {name}='{v}' is not a whole number"))
            }),
        }
    };
    let (index0, count, source) = if let Some(id) = num("SLURM_ARRAY_TASK_ID")? {
        let min = num("SLURM_ARRAY_TASK_MIN")?.unwrap_or(0);
        let count = num("SLURM_ARRAY_TASK_COUNT")?.or(given).ok_or_else(|| {
            Error::Usage(
                "--shard auto: SLURM_ARRAY_TASK_COUNT is not set; give the count as auto/N".into(),
            )
        })?;
        if id < min {
            return Err(Error::Usage(format!(
                "--shard auto: SLURM_ARRAY_TASK_ID {id} is below SLURM_ARRAY_TASK_MIN {min}"
            )));
        }
        (id - min, count, "Slurm")
    } else if let Some(i) = num("JOB_COMPLETION_INDEX")? {
        let count = given.ok_or_else(|| {
            Error::Usage(
                "--shard auto: JOB_COMPLETION_INDEX is set but the job's completions are not; give them as auto/N".into(),
            )
        })?;
        (i, count, "Kubernetes")
    } else {
        return Err(Error::Usage(
            "--shard auto: neither SLURM_ARRAY_TASK_ID nor JOB_COMPLETION_INDEX is set (not inside a job array?)".into(),
        ));
    };
    if let Some(n) = given {
        if n != count {
            return Err(Error::Usage(format!(
                "--shard auto/{n}: the {source} array has {count} tasks"
            )));
        }
    }
    if index0 >= count {
        return Err(Error::Usage(format!(
            "--shard auto: task {} of {count} from {source} is out of range (array ids must be contiguous)",
            index0 + 1
        )));
    }
    Ok(Shard {
        index: index0 + 1,
        count,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_and_rejects() {
        assert_eq!(
            "2/8".parse::<ShardSpec>(),
            Ok(ShardSpec::Fixed(Shard { index: 2, count: 8 }))
        );
        assert_eq!("auto".parse::<ShardSpec>(), Ok(ShardSpec::Auto(None)));
        assert_eq!("auto/4".parse::<ShardSpec>(), Ok(ShardSpec::Auto(Some(4))));
        for bad in ["0/4", "5/4", "x/4", "1/0", "3", "auto/0"] {
            assert!(bad.parse::<ShardSpec>().is_err(), "{bad}");
        }
        let s = Shard {
            index: 3,
            count: 12,
        };
        assert_eq!(Shard::from_folder(&s.folder()), Some(s));
        assert_eq!(Shard::from_folder("shard-5-of-4"), None);
    }

    #[test]
    fn jump_hash_is_consistent() {
        // Lamping & Veach 2014 §2: with one bucket everything is in bucket 0, and
        // growing n → n+1 only moves keys into the new bucket, about 1/(n+1) of them.
        let keys: Vec<u64> = (0..20_000u64)
            .map(|i| i.wrapping_mul(0x9e37_79b9_7f4a_7c15))
            .collect();
        assert!(keys.iter().all(|&k| jump_hash(k, 1) == 0));
        for n in 1..12 {
            let mut moved = 0;
            for &k in &keys {
                let (a, b) = (jump_hash(k, n), jump_hash(k, n + 1));
                assert!(b < n + 1);
                if a != b {
                    assert_eq!(b, n, "a key may only move to the new bucket");
                    moved += 1;
                }
            }
            let expected = keys.len() as f64 / (n + 1) as f64;
            assert!(
                (moved as f64 - expected).abs() < 0.1 * expected,
                "n={n}: moved {moved}, expected about {expected}"
            );
        }
    }

    #[test]
    fn parts_are_disjoint_and_cover_everything() {
        let paths: Vec<String> = (0..500)
            .map(|i| format!("s{}/img-{i:04}.png", i % 3))
            .collect();
        for n in [1, 2, 3, 7] {
            let mut sizes = vec![0; n];
            for p in &paths {
                let holders: Vec<usize> = (1..=n)
                    .filter(|&k| Shard { index: k, count: n }.holds(p))
                    .collect();
                assert_eq!(holders.len(), 1, "{p} in {holders:?} of {n}");
                sizes[holders[0] - 1] += 1;
            }
            for s in sizes {
                assert!((s as f64 - 500.0 / n as f64).abs() < 0.25 * 500.0 / n as f64 + 5.0);
            }
        }
    }

    #[test]
    fn resolves_from_the_scheduler() {
        let env = |pairs: &'static [(&'static str, &'static str)]| {
            move |k: &str| {
                pairs
                    .iter()
                    .find(|(a, _)| *a == k)
                    .map(|(_, v)| v.to_string())
            }
        };
        let slurm = env(&[
            ("SLURM_ARRAY_TASK_ID", "5"),
            ("SLURM_ARRAY_TASK_MIN", "4"),
            ("SLURM_ARRAY_TASK_COUNT", "4"),
        ]);
        assert_eq!(
            resolve(ShardSpec::Auto(None), &slurm).unwrap(),
            Shard { index: 2, count: 4 }
        );
        assert!(resolve(ShardSpec::Auto(Some(3)), &slurm).is_err());
        let k8s = env(&[("JOB_COMPLETION_INDEX", "0")]);
        assert_eq!(
            resolve(ShardSpec::Auto(Some(6)), &k8s).unwrap(),
            Shard { index: 1, count: 6 }
        );
        assert!(resolve(ShardSpec::Auto(None), &k8s).is_err());
        assert!(resolve(ShardSpec::Auto(None), &env(&[])).is_err());
        let out_of_range = env(&[
            ("SLURM_ARRAY_TASK_ID", "9"),
            ("SLURM_ARRAY_TASK_COUNT", "4"),
        ]);
        assert!(resolve(ShardSpec::Auto(None), &out_of_range).is_err());
    }
}
