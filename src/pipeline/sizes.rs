//! What a plan says about each stage for people: sizes, padding, receptive
//! field, cost and engine, and the table the command line prints of them.

use std::fmt::Write;

use crate::engine::Choice;
use crate::geometry::ReceptiveField;
use crate::limits::grouped;

/// What one stage does to a given input size.
#[derive(Debug, Clone, PartialEq)]
pub struct StageSizes {
    /// `conv`, `act` or `pool`.
    pub kind: &'static str,
    /// One-line description of the stage.
    pub what: String,
    /// Input (channels, height, width).
    pub input: (usize, usize, usize),
    /// Output (channels, height, width).
    pub output: (usize, usize, usize),
    /// Padding (top, bottom, left, right), for conv stages.
    pub padding: Option<(usize, usize, usize, usize)>,
    /// Receptive field after this stage (rows, cols), the widest over channels.
    pub field: (ReceptiveField, ReceptiveField),
    /// Multiply-adds (conv), comparisons or additions (pool), or operations (act).
    pub operations: u128,
    /// Input rows and columns (not padding) at the far edge that no output sees.
    pub unused: (usize, usize),
    /// The engine choice, for conv stages.
    pub engine: Option<Choice>,
}

fn shape((c, h, w): (usize, usize, usize)) -> String {
    format!("{c}×{h}×{w}")
}

/// The table of a plan's stages over an input of (channels, height, width).
pub fn sizes_table(input: (usize, usize, usize), plans: &[StageSizes]) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "input  {} (channels×height×width)", shape(input));
    let _ = writeln!(
        s,
        "{:<3} {:<7} {:<15} {:<15} {:<17} {:>16} {:<12} engine",
        "#", "stage", "output", "pad t,b,l,r", "field h×w / step", "operations", "unused r,c"
    );
    for (i, p) in plans.iter().enumerate() {
        let pad = p
            .padding
            .map_or("-".to_string(), |(t, b, l, r)| format!("{t},{b},{l},{r}"));
        let field = format!(
            "{}×{} / {}×{}",
            p.field.0.size, p.field.1.size, p.field.0.jump, p.field.1.jump
        );
        let engine = p
            .engine
            .as_ref()
            .map_or("-".to_string(), |c| format!("{} ({})", c.engine, c.reason));
        let _ = writeln!(
            s,
            "{:<3} {:<7} {:<15} {:<15} {:<17} {:>16} {:<12} {}",
            i + 1,
            p.kind,
            shape(p.output),
            pad,
            field,
            grouped(p.operations),
            format!("{},{}", p.unused.0, p.unused.1),
            engine
        );
        let _ = writeln!(s, "{:<11} {}", "", p.what);
    }
    let total: u128 = plans
        .iter()
        .filter(|p| p.kind == "conv")
        .map(|p| p.operations)
        .sum();
    let _ = writeln!(s, "multiply-adds in conv stages: {}", grouped(total));
    let _ = writeln!(
        s,
        "field: input pixels one output sees (rows×cols) and the step between outputs; \
         unused: input rows,cols at the far edge that the stride leaves out"
    );
    s
}

/// [`sizes_table`] as JSON for scripts (`tapmap reckon --json`); its schema is
/// `shared/schemas/reckon.schema.json`.
pub fn sizes_json(input: (usize, usize, usize), plans: &[StageSizes]) -> serde_json::Value {
    use serde_json::json;
    let shape = |(c, h, w): (usize, usize, usize)| json!({"channels": c, "height": h, "width": w});
    let field = |f: ReceptiveField| json!({"size": f.size, "step": f.jump, "before": f.offset});
    let count = |n: u128| u64::try_from(n).unwrap_or(u64::MAX);
    let stages: Vec<serde_json::Value> = plans
        .iter()
        .enumerate()
        .map(|(i, p)| {
            json!({
                "stage": i + 1,
                "kind": p.kind,
                "what": p.what,
                "input": shape(p.input),
                "output": shape(p.output),
                "padding": p.padding.map(|(t, b, l, r)| json!({"top": t, "bottom": b, "left": l, "right": r})),
                "field": {"rows": field(p.field.0), "cols": field(p.field.1)},
                "operations": count(p.operations),
                "unused": {"rows": p.unused.0, "cols": p.unused.1},
                "engine": p.engine.as_ref().map(|c| json!({"name": c.engine.name(), "reason": c.reason})),
            })
        })
        .collect();
    let total: u128 = plans
        .iter()
        .filter(|p| p.kind == "conv")
        .map(|p| p.operations)
        .sum();
    json!({
        "format": "tapmap-reckon",
        "reckon_version": 1,
        "input": shape(input),
        "stages": stages,
        "conv_multiply_adds": count(total),
    })
}
