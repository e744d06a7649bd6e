//! The layering rule of `kiln::LAYERS`: a module may use its own layer and the layers below it,
//! never one above. This test reads every `crate::…` path (and `use crate::{…}` group) in
//! `src/`, finds the layer of the file and of the path's first segment, and fails on an upward
//! import, naming the file and the line. Inside a layer, files reach their siblings with
//! `super::x`; `super::super::` is refused everywhere, so that no relative path can climb out of
//! a layer's folder unseen (write `crate::layer::…` instead).

use std::path::{Path, PathBuf};

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let p = entry.unwrap().path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|e| e == "rs") {
            out.push(p);
        }
    }
}

/// The layer a file belongs to: its folder under src/, or "shell" for the top-level shells.
fn layer_of_file(rel: &Path) -> Option<String> {
    let mut parts = rel
        .components()
        .map(|c| c.as_os_str().to_string_lossy().to_string());
    let first = parts.next()?;
    if rel.components().count() == 1 {
        let stem = first.trim_end_matches(".rs");
        if stem == "lib" {
            return None;
        }
        return kiln::SHELLS.contains(&stem).then(|| "shell".to_string());
    }
    Some(first)
}

fn rank(layer: &str) -> Option<usize> {
    kiln::LAYERS.iter().position(|l| *l == layer)
}

/// The first segments of the crate paths in one line of code (comments stripped).
fn crate_targets(code: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = code;
    while let Some(i) = rest.find("crate::") {
        // `kiln_crate::` or `mycrate::` are not the crate root.
        let before = rest[..i].chars().last();
        let after = &rest[i + "crate::".len()..];
        rest = after;
        if before.is_some_and(|c| c.is_alphanumeric() || c == '_') {
            continue;
        }
        if let Some(group) = after.strip_prefix('{') {
            // use crate::{a::x, b::{y, z}}: the first segment of each top-level entry.
            let mut depth = 0;
            let mut item = String::new();
            for ch in group.chars() {
                match ch {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => {
                        out.push(first_segment(&item));
                        item.clear();
                        continue;
                    }
                    _ => {}
                }
                if depth == 0 {
                    item.push(ch);
                }
            }
            out.push(first_segment(&item));
        } else {
            out.push(first_segment(after));
        }
    }
    out.retain(|s| !s.is_empty());
    out
}

fn first_segment(path: &str) -> String {
    path.trim()
        .chars()
        .take_while(|c| c.is_alphanumeric() || *c == '_')
        .collect()
}

/// Strips a `//` comment (but not inside a string: good enough for this code base, whose
/// strings never hold `crate::`).
fn code_part(line: &str) -> &str {
    match line.find("//") {
        Some(i) => &line[..i],
        None => line,
    }
}

/// Every upward import in the tree at `src`, as "file:line: layer → layer".
fn upward_imports(src: &Path) -> Vec<String> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    files.sort();
    let mut bad = Vec::new();
    for f in &files {
        let rel = f.strip_prefix(src).unwrap();
        let Some(from) = layer_of_file(rel) else {
            continue;
        };
        let Some(from_rank) = rank(&from) else {
            bad.push(format!(
                "{}: folder `{from}` is not in kiln::LAYERS",
                rel.display()
            ));
            continue;
        };
        let text = std::fs::read_to_string(f).unwrap();
        for (n, line) in text.lines().enumerate() {
            let code = code_part(line);
            if code.contains("super::super::") {
                bad.push(format!(
                    "{}:{}: `super::super::` (write `crate::{from}::…`)",
                    rel.display(),
                    n + 1
                ));
            }
            for target in crate_targets(code) {
                // Items re-exported at the crate root (lib.rs) belong to their layer.
                let layer = match target.as_str() {
                    "parse_spec" | "Spec" => "model".to_string(),
                    "KilnError" | "ErrorKind" => "common".to_string(),
                    "LAYERS" | "SHELLS" => continue,
                    other => other.to_string(),
                };
                match rank(&layer) {
                    Some(r) if r <= from_rank => {}
                    Some(_) => bad.push(format!(
                        "{}:{}: layer `{from}` imports from the higher layer `{layer}`",
                        rel.display(),
                        n + 1
                    )),
                    None => bad.push(format!(
                        "{}:{}: `crate::{target}` is not a layer of kiln::LAYERS",
                        rel.display(),
                        n + 1
                    )),
                }
            }
        }
    }
    bad
}

#[test]
fn no_module_imports_from_a_higher_layer() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let bad = upward_imports(&src);
    assert!(bad.is_empty(), "upward imports:\n{}", bad.join("\n"));
}

#[test]
fn every_layer_folder_exists_and_is_declared() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let lib = std::fs::read_to_string(src.join("lib.rs")).unwrap();
    for layer in kiln::LAYERS.iter().filter(|l| **l != "shell") {
        assert!(
            src.join(layer).join("mod.rs").is_file(),
            "src/{layer}/mod.rs"
        );
        assert!(
            lib.contains(&format!("pub mod {layer};")),
            "lib.rs declares {layer}"
        );
    }
}

#[test]
fn the_checker_catches_an_upward_import() {
    // A scratch tree with one downward and one upward import, and a grouped upward one.
    let dir = std::env::temp_dir().join(format!("kiln-layers-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(dir.join("search")).unwrap();
    std::fs::create_dir_all(dir.join("common")).unwrap();
    std::fs::write(
        dir.join("search/modes.rs"),
        "use crate::common::maths::ln;\nuse crate::report::text; // upward\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("common/format.rs"),
        "// crate::run in a comment is fine\nuse crate::{common::maths, estimate::summary};\n",
    )
    .unwrap();
    let bad = upward_imports(&dir);
    let _ = std::fs::remove_dir_all(&dir);
    assert_eq!(bad.len(), 2, "{bad:?}");
    assert!(bad[0].starts_with("common/format.rs:2:") && bad[0].contains("`estimate`"));
    assert!(bad[1].starts_with("search/modes.rs:2:") && bad[1].contains("`report`"));
}

#[test]
fn grouped_paths_name_each_first_segment() {
    assert_eq!(
        crate_targets("use crate::{a::x, b::{y, z}, c};"),
        vec!["a", "b", "c"]
    );
    assert_eq!(
        crate_targets("let x = crate::sample::Plan::new();"),
        vec!["sample"]
    );
    assert!(crate_targets("use kiln_crate::x;").is_empty());
}
