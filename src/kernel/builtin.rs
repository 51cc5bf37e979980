//! Resolving `--bank NAME|FILE`: a bank file, a weight file (`.npy`, `.npz`,
//! `.safetensors`, optionally `FILE:TENSOR`, imported as `oihw`), a shipped bank, or built-in family
//! specs joined with `+` (`sobel-x+sobel-y`, `gaussian:sigma=2`).
//!
//! The shipped banks are the files in the repository's `kernels/` folder, compiled
//! into the binary so they work wherever the binary is copied.

use std::path::Path;

use crate::error::Error;
use crate::kernel::bankfile::{parse_bank, read_bank};
use crate::kernel::families::{near_names_hint, FamilySpec, FAMILIES};
use crate::kernel::{Bank, Op};

/// Shipped bank files: (name, TOML text).
pub static SHIPPED_BANKS: &[(&str, &str)] = &[
    ("edges", include_str!("../../kernels/edges.toml")),
    ("gradients", include_str!("../../kernels/gradients.toml")),
    ("smooth", include_str!("../../kernels/smooth.toml")),
    ("blobs", include_str!("../../kernels/blobs.toml")),
    ("texture", include_str!("../../kernels/texture.toml")),
];

/// A shipped bank by name.
pub fn shipped_bank(name: &str) -> Option<Result<Bank, Error>> {
    SHIPPED_BANKS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|(n, text)| parse_bank(text, Path::new(&format!("kernels/{n}.toml"))))
}

/// Resolves a `--bank` argument: an existing file (or any name ending in `.toml`),
/// a shipped bank, or `+`-joined family specs (built-ins declare `correlate`).
pub fn resolve_bank(arg: &str) -> Result<Bank, Error> {
    if let Some((file, tensor)) = crate::kernel::import::is_weight_file(arg) {
        let opts = crate::kernel::import::ImportOptions {
            tensor: tensor.map(String::from),
            ..Default::default()
        };
        return crate::kernel::import::import_bank(Path::new(file), &opts);
    }
    let path = Path::new(arg);
    if path.is_file() || arg.ends_with(".toml") {
        return read_bank(path);
    }
    if let Some(b) = shipped_bank(arg) {
        return b;
    }
    let specs: Vec<&str> = arg.split('+').collect();
    let mut kernels = Vec::with_capacity(specs.len());
    // The op of the joined bank: shipped banks bring their own, families are
    // `correlate`; every part must agree, since one op runs the whole bank,
    // except parts whose kernels all equal their own 180° turn (a Gaussian, a
    // box), which give the same maps under either op.
    let mut op: Option<(Op, String)> = None;
    let mut agree = |o: Op, part: &str| -> Result<(), Error> {
        match op {
            Some((first, ref at)) if first != o => Err(Error::bank(format!(
                "'{arg}' joins parts that declare different ops: '{at}' is {first}, '{part}' \
                 is {o}; one bank runs with one op, so join parts of one op (or write a bank \
                 file that states it)"
            ))),
            Some(_) => Ok(()),
            None => {
                op = Some((o, part.to_string()));
                Ok(())
            }
        }
    };
    for s in specs {
        if let Some(b) = shipped_bank(s) {
            let b = b?;
            if !b.kernels.iter().all(turn_symmetric) {
                agree(b.op, s)?;
            }
            kernels.extend(b.kernels);
            continue;
        }
        let spec = FamilySpec::parse(s)?;
        if crate::kernel::families::find(&spec.family).is_none() {
            let names = FAMILIES
                .iter()
                .map(|f| f.name)
                .chain(SHIPPED_BANKS.iter().map(|(n, _)| *n));
            return Err(Error::bank(format!(
                "'{}' is not a bank file, a shipped bank or a kernel family{} \
                 (`tapmap bank list` shows them all)",
                spec.family,
                near_names_hint(&spec.family, names)
            )));
        }
        let k = spec.build(Some(s))?;
        if !turn_symmetric(&k) {
            agree(Op::Correlate, s)?;
        }
        kernels.push(k);
    }
    let op = op.map_or(Op::Correlate, |(o, _)| o);
    let mut seen = std::collections::HashSet::new();
    if let Some(k) = kernels.iter().find(|k| !seen.insert(k.name.clone())) {
        return Err(Error::bank(format!(
            "'{arg}' gives two kernels named '{}'; join each part once",
            k.name
        )));
    }
    let bank = Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: arg.to_string(),
        op,
        description: None,
        kernels,
    };
    bank.validate()?;
    Ok(bank)
}

/// Whether a kernel equals its own 180° turn, so that convolution and
/// correlation with it give the same map.
fn turn_symmetric(k: &crate::kernel::Kernel) -> bool {
    k.planes
        .iter()
        .all(|p| p.iter().zip(p.iter().rev()).all(|(a, b)| a == b))
}

/// A bank from family specs as `bank make` takes them: `FAMILY[:KEY=VALUE,...]`,
/// where a lone `KEY=VALUE` applies to the family before it.
pub fn bank_from_specs(specs: &[String], name: &str, op: Op) -> Result<Bank, Error> {
    let mut parsed: Vec<FamilySpec> = Vec::new();
    for s in specs {
        match (s.contains('='), s.contains(':'), parsed.last_mut()) {
            (true, false, Some(last)) => {
                let extra = FamilySpec::parse(&format!("x:{s}"))?;
                for (k, v) in extra.params {
                    if last.params.insert(k.clone(), v).is_some() {
                        return Err(Error::bank(format!(
                            "parameter {k} is given twice for family {}; give it once",
                            last.family
                        )));
                    }
                }
            }
            (true, false, None) => {
                return Err(Error::bank(format!(
                    "parameter '{s}' comes before any family"
                )))
            }
            _ => parsed.push(FamilySpec::parse(s)?),
        }
    }
    let kernels = parsed
        .iter()
        .map(|s| s.build(None))
        .collect::<Result<Vec<_>, _>>()?;
    let bank = Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: name.to_string(),
        op,
        description: None,
        kernels,
    };
    bank.validate()?;
    Ok(bank)
}
