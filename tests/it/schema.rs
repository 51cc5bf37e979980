//! tapmap's output files against the JSON Schemas it ships in
//! `shared/schemas/` (JSON Schema 2020-12), and its refusal of foreign and
//! newer files.
//!
//! The validator here covers the part of JSON Schema those files use: `$ref`
//! (within a file and to a sibling file), `type`, `const`, `enum`, `oneOf`,
//! `properties`, `required`, `additionalProperties: false`, `items`,
//! `minItems`/`maxItems`, `minimum`/`maximum` and `pattern`. It is written
//! here, a few dozen lines, because the general-purpose validator crates bring
//! dozens of dependencies for what these checks need; a keyword the shipped
//! schemas use but this validator does not know fails the test, so nothing is
//! silently skipped.

use std::path::{Path, PathBuf};

use serde_json::Value;

fn schema_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("shared/schemas")
}

fn load(file: &str) -> Value {
    serde_json::from_str(&std::fs::read_to_string(schema_dir().join(file)).unwrap()).unwrap()
}

const KNOWN: [&str; 18] = [
    "$schema",
    "$id",
    "$ref",
    "$defs",
    "title",
    "description",
    "type",
    "const",
    "enum",
    "oneOf",
    "properties",
    "required",
    "additionalProperties",
    "items",
    "minItems",
    "maxItems",
    "minimum",
    "maximum",
];

/// Checks `v` against `schema` (found in `file`); returns the first problem,
/// with the JSON path where it is.
pub fn check(v: &Value, schema: &Value, file: &str, at: &str) -> Result<(), String> {
    let s = schema
        .as_object()
        .ok_or_else(|| format!("{at}: schema is not an object"))?;
    for k in s.keys() {
        if !KNOWN.contains(&k.as_str()) && k != "pattern" {
            return Err(format!(
                "{at}: schema keyword '{k}' is not known to this validator"
            ));
        }
    }
    if let Some(r) = s.get("$ref").and_then(Value::as_str) {
        let (target_file, pointer) = r.split_once('#').unwrap_or((r, ""));
        let target_file = if target_file.is_empty() {
            file
        } else {
            target_file
        };
        let root = load(target_file);
        let sub = root
            .pointer(pointer)
            .ok_or_else(|| format!("{at}: $ref {r} not found"))?;
        return check(v, sub, target_file, at);
    }
    if let Some(alts) = s.get("oneOf").and_then(Value::as_array) {
        let ok = alts
            .iter()
            .filter(|a| check(v, a, file, at).is_ok())
            .count();
        if ok != 1 {
            let why: Vec<String> = alts
                .iter()
                .filter_map(|a| check(v, a, file, at).err())
                .collect();
            return Err(format!(
                "{at}: matches {ok} of oneOf's {} ({})",
                alts.len(),
                why.join("; ")
            ));
        }
    }
    if let Some(c) = s.get("const") {
        if v != c {
            return Err(format!("{at}: {v} is not {c}"));
        }
    }
    if let Some(e) = s.get("enum").and_then(Value::as_array) {
        if !e.contains(v) {
            return Err(format!("{at}: {v} is not one of {e:?}"));
        }
    }
    if let Some(t) = s.get("type") {
        let types: Vec<&str> = match t {
            Value::String(x) => vec![x.as_str()],
            Value::Array(xs) => xs.iter().filter_map(Value::as_str).collect(),
            _ => return Err(format!("{at}: bad type keyword")),
        };
        let fits = |t: &str| match t {
            "object" => v.is_object(),
            "array" => v.is_array(),
            "string" => v.is_string(),
            "number" => v.is_number(),
            "integer" => v.is_u64() || v.is_i64(),
            "boolean" => v.is_boolean(),
            "null" => v.is_null(),
            _ => false,
        };
        if !types.iter().any(|t| fits(t)) {
            return Err(format!("{at}: {v} is not of type {types:?}"));
        }
    }
    if let (Some(n), Some(min)) = (v.as_f64(), s.get("minimum").and_then(Value::as_f64)) {
        if n < min {
            return Err(format!("{at}: {n} < {min}"));
        }
    }
    if let (Some(n), Some(max)) = (v.as_f64(), s.get("maximum").and_then(Value::as_f64)) {
        if n > max {
            return Err(format!("{at}: {n} > {max}"));
        }
    }
    if let (Some(text), Some(p)) = (v.as_str(), s.get("pattern").and_then(Value::as_str)) {
        if !regex::Regex::new(p).unwrap().is_match(text) {
            return Err(format!("{at}: '{text}' does not match {p}"));
        }
    }
    if let Some(obj) = v.as_object() {
        let props = s.get("properties").and_then(Value::as_object);
        for r in s
            .get("required")
            .and_then(Value::as_array)
            .into_iter()
            .flatten()
        {
            let r = r.as_str().unwrap();
            if !obj.contains_key(r) {
                return Err(format!("{at}: '{r}' is required"));
            }
        }
        for (k, val) in obj {
            match props.and_then(|p| p.get(k)) {
                Some(sub) => check(val, sub, file, &format!("{at}.{k}"))?,
                None if s.get("additionalProperties") == Some(&Value::Bool(false)) => {
                    return Err(format!("{at}: '{k}' is not in the schema"))
                }
                None => {}
            }
        }
    }
    if let Some(arr) = v.as_array() {
        let len = arr.len() as u64;
        if s.get("minItems")
            .and_then(Value::as_u64)
            .is_some_and(|m| len < m)
        {
            return Err(format!("{at}: {len} items, fewer than minItems"));
        }
        if s.get("maxItems")
            .and_then(Value::as_u64)
            .is_some_and(|m| len > m)
        {
            return Err(format!("{at}: {len} items, more than maxItems"));
        }
        if let Some(items) = s.get("items") {
            for (i, x) in arr.iter().enumerate() {
                check(x, items, file, &format!("{at}[{i}]"))?;
            }
        }
    }
    Ok(())
}

/// Checks a whole file against a shipped schema.
pub fn check_file(v: &Value, schema_file: &str) -> Result<(), String> {
    check(v, &load(schema_file), schema_file, "$")
}

fn tapmap() -> assert_cmd::Command {
    assert_cmd::cargo::cargo_bin_cmd!("tapmap")
}

fn sample(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("sample_data")
        .join(rel)
}

#[test]
fn the_validator_refuses_what_the_schemas_forbid() {
    let schema = load("manifest.schema.json");
    let file = serde_json::json!({"path": "a", "bytes": 3});
    let def = &schema["$defs"]["file"];
    assert!(check(&file, def, "manifest.schema.json", "$").is_ok());
    let extra = serde_json::json!({"path": "a", "bytes": 3, "x": 1});
    assert!(check(&extra, def, "manifest.schema.json", "$")
        .unwrap_err()
        .contains("'x'"));
    let negative = serde_json::json!({"path": "a", "bytes": -1});
    assert!(check(&negative, def, "manifest.schema.json", "$").is_err());
    let missing = serde_json::json!({"path": "a"});
    assert!(check(&missing, def, "manifest.schema.json", "$")
        .unwrap_err()
        .contains("required"));
}

#[test]
fn manifests_and_journals_of_runs_and_merges_follow_their_schemas() {
    let t = tempfile::TempDir::new().unwrap();
    let out = t.path().join("run");
    // A good run with a failed input, views of both scales, and every output.
    let inputs = t.path().join("in");
    std::fs::create_dir_all(&inputs).unwrap();
    for f in [
        "line-a/s1-glaze/tile-0001-crack.png",
        "handheld/photo-0013-orient6.jpg",
    ] {
        std::fs::copy(sample(f), inputs.join(Path::new(f).file_name().unwrap())).unwrap();
    }
    std::fs::write(inputs.join("broken.png"), b"not an image").unwrap();
    tapmap()
        .args([
            "apply",
            "-q",
            "--bank",
            "sobel-x+gaussian:sigma=1",
            "--save",
            "all",
        ])
        .args([
            "--pad-width",
            "1,2,3,4",
            "--threshold",
            "0.1",
            "--resume",
            "-o",
        ])
        .arg(&out)
        .arg(&inputs)
        .assert()
        .code(1);
    let manifest: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).unwrap()).unwrap();
    check_file(&manifest, "manifest.schema.json").unwrap();
    let journal = std::fs::read_to_string(out.join("journal.jsonl")).unwrap();
    let lines: Vec<Value> = journal
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 4, "a head and three entries");
    for l in &lines {
        check_file(l, "journal.schema.json").unwrap();
    }
    // A recipe with act and pool stages, and a merge of two shards.
    let recipe = t.path().join("r.toml");
    std::fs::write(
        &recipe,
        "[[stage]]\nconv = \"edges\"\n[[stage]]\nact = \"relu\"\n[[stage]]\npool = \"max\"\nsize = 2\n\
         [[stage]]\npool = \"mean\"\nsize = \"global\"\n",
    )
    .unwrap();
    let sharded = t.path().join("sharded");
    for k in ["1/2", "2/2"] {
        tapmap()
            .args(["apply", "-q", "--shard", k, "--recipe"])
            .arg(&recipe)
            .arg("-o")
            .arg(&sharded)
            .arg(sample("line-a"))
            .assert()
            .success();
    }
    tapmap()
        .args(["merge", "-q"])
        .arg(&sharded)
        .assert()
        .success();
    for m in [
        sharded.join("manifest.json"),
        sharded.join("shard-1-of-2/manifest.json"),
    ] {
        let v: Value = serde_json::from_str(&std::fs::read_to_string(&m).unwrap()).unwrap();
        check_file(&v, "manifest.schema.json").unwrap_or_else(|e| panic!("{}: {e}", m.display()));
    }
}

#[test]
fn foreign_and_newer_records_are_refused_with_what_they_are() {
    let t = tempfile::TempDir::new().unwrap();
    let out = t.path().join("o");
    for k in ["1/2", "2/2"] {
        tapmap()
            .args(["apply", "-q", "--bank", "edges", "--shard", k, "-o"])
            .arg(&out)
            .arg(sample("line-a"))
            .assert()
            .success();
    }
    let m = out.join("shard-1-of-2/manifest.json");
    let good = std::fs::read_to_string(&m).unwrap();
    for (text, says) in [
        (
            good.replace("\"manifest_version\": 1", "\"manifest_version\": 7"),
            "newer tapmap (layout 7",
        ),
        (
            "{\"tool\": \"tapmap\"}".to_string(),
            "not a tapmap tapmap-manifest file",
        ),
        ("[1, 2]".to_string(), "not a tapmap tapmap-manifest file"),
    ] {
        std::fs::write(&m, text).unwrap();
        let a = tapmap().args(["merge"]).arg(&out).assert().code(2);
        let err = String::from_utf8_lossy(&a.get_output().stderr).into_owned();
        assert!(err.contains("manifest.json") && err.contains(says), "{err}");
    }
    std::fs::write(&m, good).unwrap();
    // A journal of a newer layout: --resume refuses it rather than guessing.
    let j = out.join("shard-2-of-2/journal.jsonl");
    let text = std::fs::read_to_string(&j).unwrap();
    std::fs::write(
        &j,
        text.replacen("\"journal_version\":1", "\"journal_version\":2", 1),
    )
    .unwrap();
    let a = tapmap()
        .args([
            "apply", "-q", "--bank", "edges", "--shard", "2/2", "--resume", "-o",
        ])
        .arg(&out)
        .arg(sample("line-a"))
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&a.get_output().stderr).into_owned();
    assert!(
        err.contains("journal.jsonl") && err.contains("newer tapmap (layout 2"),
        "{err}"
    );
}

use crate::common::json_of;

#[test]
fn json_outputs_follow_their_schemas() {
    for (args, schema) in [
        (
            vec!["reckon", "--size", "640x480", "--bank", "edges", "--json"],
            "reckon.schema.json",
        ),
        (
            vec![
                "reckon",
                "--size",
                "1024x768",
                "--bank",
                "blobs",
                "--extent",
                "valid",
                "--stride",
                "2",
                "--pool",
                "max",
                "--pool-size",
                "2",
                "--act",
                "relu",
                "--json",
            ],
            "reckon.schema.json",
        ),
        (vec!["bank", "list", "--json"], "bank-list.schema.json"),
        (
            vec!["bank", "show", "edges+smooth", "--json"],
            "bank.schema.json",
        ),
    ] {
        let v = json_of(&args);
        check_file(&v, schema).unwrap_or_else(|e| panic!("{args:?}: {e}"));
    }
    // The JSON says what the text says.
    let r = json_of(&["reckon", "--size", "640x480", "--bank", "edges", "--json"]);
    assert_eq!(r["stages"][0]["output"]["channels"], 3);
    assert_eq!(r["stages"][0]["field"]["rows"]["size"], 3);
    let b = json_of(&["bank", "show", "sobel-x", "--json"]);
    // Sobel x, [1 2 1]ᵀ ⊗ [−1 0 1] (Szeliski 2010, §3.2.1, Fig. 3.14, as the
    // family's own source line cites).
    assert_eq!(
        b["kernels"][0]["planes"][0],
        serde_json::json!([[-1.0, 0.0, 1.0], [-2.0, 0.0, 2.0], [-1.0, 0.0, 1.0]])
    );
    let l = json_of(&["bank", "list", "--json"]);
    assert!(l["shipped"]
        .as_array()
        .unwrap()
        .iter()
        .any(|s| s["name"] == "edges"));

    let t = tempfile::TempDir::new().unwrap();
    let out = t.path().join("o");
    let s = json_of(&[
        "apply",
        "--bank",
        "edges",
        "-q",
        "--json",
        "-o",
        out.to_str().unwrap(),
        sample("line-a/s1-glaze/tile-0001-crack.png")
            .to_str()
            .unwrap(),
    ]);
    check_file(&s, "summary.schema.json").unwrap();
    assert_eq!(s["processed"], 1);
    assert_eq!(s["folder"], out.to_str().unwrap());
}

#[test]
fn completions_load_in_bash_and_the_manual_renders() {
    let script = tapmap()
        .args(["completions", "bash"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let t = tempfile::TempDir::new().unwrap();
    let file = t.path().join("tapmap.bash");
    std::fs::write(&file, &script).unwrap();
    // Loaded into bash, the script registers a completion for tapmap.
    let o = std::process::Command::new("bash")
        .arg("-c")
        .arg(format!("source {} && complete -p tapmap", file.display()))
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stdout).contains("tapmap"));
    for shell in ["zsh", "fish"] {
        let s = tapmap()
            .args(["completions", shell])
            .assert()
            .success()
            .get_output()
            .stdout
            .clone();
        assert!(String::from_utf8_lossy(&s).contains("reckon"), "{shell}");
    }
    for page in [
        vec!["man"],
        vec!["man", "apply"],
        vec!["man", "bank", "make"],
    ] {
        let roff = tapmap()
            .args(&page)
            .assert()
            .success()
            .get_output()
            .stdout
            .clone();
        let roff = String::from_utf8(roff).unwrap();
        assert!(
            roff.starts_with(".ie") || roff.contains(".TH"),
            "{page:?}: not roff"
        );
        let f = t.path().join("page.1");
        std::fs::write(&f, &roff).unwrap();
        // `man -l` renders it, where man is installed.
        if let Ok(o) = std::process::Command::new("man")
            .arg("-l")
            .arg(&f)
            .env("MANPAGER", "cat")
            .env("PAGER", "cat")
            .output()
        {
            if o.status.success() {
                let text = String::from_utf8_lossy(&o.stdout);
                assert!(
                    text.contains("NAME") && text.contains("SYNOPSIS"),
                    "{page:?}: {text}"
                );
            }
        }
    }
    tapmap().args(["man", "nothing"]).assert().code(2);
}

#[test]
fn probe_and_border_studies_write_manifests_that_follow_their_schema() {
    let t = tempfile::TempDir::new().unwrap();
    let inputs = t.path().join("in");
    std::fs::create_dir_all(&inputs).unwrap();
    std::fs::copy(
        sample("line-a/s1-glaze/tile-0001-crack.png"),
        inputs.join("crack.png"),
    )
    .unwrap();
    std::fs::write(inputs.join("broken.png"), b"not an image").unwrap();
    for (job, extra) in [
        ("probe", vec!["--top", "3"]),
        ("borders", vec!["--crop", "24"]),
    ] {
        let out = t.path().join(job);
        tapmap()
            .args([job, "--bank", "smooth", "-q", "-o", out.to_str().unwrap()])
            .args(&extra)
            .arg(&inputs)
            .assert()
            .code(1);
        let m: Value =
            serde_json::from_slice(&std::fs::read(out.join("manifest.json")).unwrap()).unwrap();
        check_file(&m, "study-manifest.schema.json").unwrap_or_else(|e| panic!("{job}: {e}"));
        assert_eq!(m["format"], format!("tapmap-{job}"));
        let inputs = m["inputs"].as_array().unwrap();
        assert_eq!(inputs.len(), 2);
        assert_eq!(inputs[0]["path"], "broken.png");
        assert_eq!(inputs[0]["status"], "failed");
        assert_eq!(inputs[1]["status"], "ok");
        // The digest is the file's SHA-256 (FIPS 180-4), as apply records it.
        let bytes = std::fs::read(sample("line-a/s1-glaze/tile-0001-crack.png")).unwrap();
        assert_eq!(inputs[1]["sha256"], tapmap::digest::sha256_hex(&bytes));
        assert!(m["recipe"]["stages"][0]["bank_file"]
            .as_str()
            .unwrap()
            .contains("[[kernel]]"));
        for f in m["files"].as_array().unwrap() {
            let p = out.join(f["path"].as_str().unwrap());
            assert_eq!(
                std::fs::metadata(&p).unwrap().len(),
                f["bytes"].as_u64().unwrap()
            );
        }
        // A study's folder is a run folder: never read as input.
        tapmap()
            .args([
                "apply",
                "--bank",
                "edges",
                "-o",
                t.path().join("x").to_str().unwrap(),
            ])
            .arg(out.join("manifest.json").parent().unwrap())
            .assert()
            .code(2);
    }
}
