//! Kernels and banks described for people: the built-in families with their
//! parameters and sources, the shipped banks, and one bank's taps with their
//! sum, L1 norm, rank, factors and symmetry.

use std::fmt::Write;

use crate::kernel::analysis::{analyse_plane, Parity};
use crate::kernel::builtin::{shipped_bank, SHIPPED_BANKS};
use crate::kernel::families::FAMILIES;
use crate::kernel::Bank;

/// The `bank list` text.
pub fn family_list() -> String {
    let mut s =
        String::from("Kernel families (use as --bank FAMILY[:KEY=VALUE,...], join with '+'):\n");
    for f in FAMILIES {
        let _ = writeln!(s, "\n  {:<10} {}", f.name, f.summary);
        for p in f.params {
            let d = p.default.map_or("derived".to_string(), |v| v.to_string());
            let _ = writeln!(s, "  {:<10}   {} = {d}: {}", "", p.name, p.meaning);
        }
        let _ = writeln!(s, "  {:<10}   source: {}", "", f.source);
    }
    s.push_str("\nShipped banks (files in kernels/, built into the binary):\n");
    for (name, text) in SHIPPED_BANKS {
        let desc = shipped_bank(name)
            .and_then(Result::ok)
            .map(|b| {
                format!(
                    "{} kernels, {}: {}",
                    b.kernels.len(),
                    b.op,
                    b.description.unwrap_or_default()
                )
            })
            .unwrap_or_else(|| format!("({} bytes)", text.len()));
        let _ = writeln!(s, "  {name:<10} {desc}");
    }
    s
}

fn num(v: f64) -> String {
    if v == v.round() && v.abs() < 1e6 {
        format!("{v}")
    } else {
        format!("{v:.6}")
    }
}

fn vector(v: &[f64]) -> String {
    let parts: Vec<String> = v.iter().map(|x| num(*x)).collect();
    format!("[{}]", parts.join(" "))
}

/// The `bank show` text.
pub fn bank_details(bank: &Bank) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "bank {}: {} kernel(s), op {}",
        bank.name,
        bank.kernels.len(),
        bank.op
    );
    if let Some(d) = &bank.description {
        let _ = writeln!(s, "  {d}");
    }
    if let Some(eps) = bank.contrast {
        let _ = writeln!(
            s,
            "  contrast: each response is divided by sqrt(variance of its window + {eps:.6e}) \
             before the bias"
        );
    }
    if let Some(p) = &bank.provenance {
        let get = |k: &str| p.get(k).map_or_else(String::new, |v| v.to_string());
        let _ = writeln!(
            s,
            "  learned: method {}, whiten {}, size {}, {} patches of {} positions, seed {}",
            get("method"),
            get("whiten"),
            get("size"),
            get("patches"),
            get("positions"),
            get("seed")
        );
        for key in ["explained_ratio", "cluster_sizes"] {
            if let Some(v) = p.get(key) {
                let _ = writeln!(s, "  {key}: {v}");
            }
        }
    }
    for k in &bank.kernels {
        let origin = k
            .origin
            .as_ref()
            .map_or(String::new(), |o| format!(", from {o}"));
        let _ = writeln!(
            s,
            "\nkernel {}: {}×{} (rows×cols), {} plane(s), scale {}, bias {}{origin}",
            k.name,
            k.rows,
            k.cols,
            k.channels(),
            num(k.scale),
            num(k.bias)
        );
        for c in 0..k.channels() {
            if k.channels() > 1 {
                let _ = writeln!(s, "  plane {c}:");
            }
            let cells: Vec<Vec<String>> = k
                .plane_rows(c)
                .iter()
                .map(|r| r.iter().map(|v| num(*v)).collect())
                .collect();
            let width = cells.iter().flatten().map(String::len).max().unwrap_or(1);
            for row in &cells {
                let line: Vec<String> = row.iter().map(|v| format!("{v:>width$}")).collect();
                let _ = writeln!(s, "    {}", line.join(" "));
            }
            let a = analyse_plane(k, c);
            let _ = writeln!(s, "  sum {}  L1 {}  rank {}", num(a.sum), num(a.l1), a.rank);
            if let Some((u, v)) = &a.factors {
                let _ = writeln!(s, "  separable: column {} ⊗ row {}", vector(u), vector(v));
            }
            let sym = a.symmetry;
            let _ = writeln!(
                s,
                "  symmetry: left-right {}, top-bottom {}, 180° {}, transpose {}{}",
                sym.mirror_x,
                sym.mirror_y,
                sym.rot180,
                sym.transpose,
                if sym.rot180 == Parity::Even {
                    " (convolve = correlate)"
                } else {
                    ""
                }
            );
        }
    }
    s
}

/// [`family_list`] as JSON for scripts (`tapmap bank list --json`); schema
/// `shared/schemas/bank-list.schema.json`.
pub fn family_list_json() -> serde_json::Value {
    use serde_json::json;
    let families: Vec<serde_json::Value> = FAMILIES
        .iter()
        .map(|f| {
            json!({
                "name": f.name,
                "summary": f.summary,
                "source": f.source,
                "params": f.params.iter().map(|p| json!({
                    "name": p.name, "default": p.default, "meaning": p.meaning,
                })).collect::<Vec<_>>(),
            })
        })
        .collect();
    let shipped: Vec<serde_json::Value> = SHIPPED_BANKS
        .iter()
        .filter_map(|(name, _)| shipped_bank(name).and_then(Result::ok))
        .map(|b| {
            json!({
                "name": b.name,
                "kernels": b.kernels.len(),
                "op": b.op.to_string(),
                "description": b.description,
            })
        })
        .collect();
    json!({
        "format": "tapmap-bank-list",
        "list_version": 1,
        "families": families,
        "shipped": shipped,
    })
}

/// [`bank_details`] as JSON for scripts (`tapmap bank show --json`): every
/// kernel with its taps, plane by plane, row by row; schema
/// `shared/schemas/bank.schema.json`.
pub fn bank_json(bank: &Bank) -> serde_json::Value {
    use serde_json::json;
    let kernels: Vec<serde_json::Value> = bank
        .kernels
        .iter()
        .map(|k| {
            let planes: Vec<Vec<Vec<f64>>> = k
                .planes
                .iter()
                .map(|p| p.chunks(k.cols.max(1)).map(<[f64]>::to_vec).collect())
                .collect();
            json!({
                "name": k.name,
                "rows": k.rows,
                "cols": k.cols,
                "planes": planes,
                "scale": k.scale,
                "bias": k.bias,
                "origin": k.origin.as_ref().map(|o| o.to_string()),
            })
        })
        .collect();
    json!({
        "format": "tapmap-bank",
        "bank_version": 1,
        "name": bank.name,
        "op": bank.op.to_string(),
        "description": bank.description,
        "normalize": bank.normalize.as_ref().map(|n| json!({"mean": n.mean, "std": n.std})),
        "contrast": bank.contrast,
        "learned": bank.provenance.as_ref().map(|p| serde_json::to_value(p).unwrap_or_default()),
        "kernels": kernels,
    })
}
