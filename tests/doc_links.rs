//! Every document and repository path a tracked file names exists in the repository,
//! and nothing points to notes the repository does not ship.
//!
//! Scanned: every tracked text file (sources, docs, scripts, configuration; not the
//! generated vector data). Checked in each:
//! - `*.md` references (bare or as Markdown link targets): the file must exist, relative
//!   to the referring file or to the repository root (or, in sources, which generate
//!   pages under `docs/`, relative to `docs/`); a `#anchor` on a Markdown target
//!   must name one of its headings;
//! - paths under the top-level directories (`src/`, `tests/`, `docs/`, `examples/`,
//!   `vectors/`, `benches/`, `.ci/`) must exist as a file or directory;
//! - references to the team's private notes (never part of the product) are errors.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

/// Top-level directories whose paths are checked.
const ROOTS: &[&str] = &[
    "src/",
    "tests/",
    "docs/",
    "examples/",
    "vectors/",
    "benches/",
    ".ci/",
];

/// Names of notes outside the repository (built from pieces so this file does not name
/// them itself).
fn private_notes() -> Vec<String> {
    vec![
        ["DESIGN", ".md"].concat(),
        ["STYLE", ".md"].concat(),
        ["../", "shared"].concat(),
        ["work/", "shared"].concat(),
    ]
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Tracked files, from git; without git (an unpacked source archive), every file under
/// the root except build output and VCS data.
fn tracked_files() -> Vec<String> {
    let output = std::process::Command::new("git")
        .args(["ls-files", "-z"])
        .current_dir(root())
        .output();
    if let Ok(out) = output {
        if out.status.success() {
            return String::from_utf8_lossy(&out.stdout)
                .split('\0')
                .filter(|s| !s.is_empty())
                .map(String::from)
                .collect();
        }
    }
    fn walk(dir: &Path, base: &Path, out: &mut Vec<String>) {
        for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
            let path = entry.path();
            let name = entry.file_name().to_string_lossy().to_string();
            if name == "target" || name == ".git" {
                continue;
            }
            if path.is_dir() {
                walk(&path, base, out);
            } else if let Ok(rel) = path.strip_prefix(base) {
                out.push(rel.to_string_lossy().replace('\\', "/"));
            }
        }
    }
    let mut out = Vec::new();
    walk(&root(), &root(), &mut out);
    out
}

fn is_scanned(path: &str) -> bool {
    // This file's own examples are broken on purpose (the scanner's planted-bug test).
    if path == "tests/doc_links.rs" {
        return false;
    }
    if path.starts_with("vectors/core/") || path.ends_with(".json") || path == "Cargo.lock" {
        return false;
    }
    let text_ext = ["md", "rs", "py", "toml", "txt", "sh", "yml", "yaml"];
    path == ".ci/run"
        || path == ".gitignore"
        || Path::new(path)
            .extension()
            .is_some_and(|e| text_ext.contains(&e.to_string_lossy().as_ref()))
}

fn path_char(c: char) -> bool {
    c.is_ascii_alphanumeric() || "_./-".contains(c)
}

/// `*.md` references in `text`, with their `#anchor` if any.
fn markdown_refs(text: &str) -> Vec<(String, Option<String>)> {
    let mut out = Vec::new();
    let bytes: Vec<char> = text.chars().collect();
    let mut i = 0;
    while i + 3 <= bytes.len() {
        let at_md = bytes[i] == '.'
            && bytes[i + 1] == 'm'
            && bytes[i + 2] == 'd'
            && bytes.get(i + 3).is_none_or(|c| !c.is_ascii_alphanumeric());
        if !at_md {
            i += 1;
            continue;
        }
        let mut start = i;
        while start > 0 && path_char(bytes[start - 1]) {
            start -= 1;
        }
        let path: String = bytes[start..i + 3].iter().collect();
        let mut end = i + 3;
        let mut anchor = None;
        if bytes.get(end) == Some(&'#') {
            let from = end + 1;
            end = from;
            while end < bytes.len()
                && (bytes[end].is_ascii_alphanumeric() || "-_".contains(bytes[end]))
            {
                end += 1;
            }
            anchor = Some(bytes[from..end].iter().collect());
        }
        // A bare extension (as in "*.md") names no file.
        if path != ".md" {
            out.push((path, anchor));
        }
        i = end.max(i + 3);
    }
    out
}

/// Paths under the checked top-level directories in `text`.
fn repository_paths(text: &str) -> Vec<String> {
    let chars: Vec<char> = text.chars().collect();
    let mut out = Vec::new();
    for i in 0..chars.len() {
        let boundary = i == 0 || !path_char(chars[i - 1]);
        if !boundary {
            continue;
        }
        for prefix in ROOTS {
            let p: Vec<char> = prefix.chars().collect();
            if chars.len() >= i + p.len() && chars[i..i + p.len()] == p[..] {
                let mut end = i + p.len();
                while end < chars.len() && path_char(chars[end]) {
                    end += 1;
                }
                let mut path: String = chars[i..end].iter().collect();
                while path.ends_with('.') || path.ends_with('-') {
                    path.pop();
                }
                // Markdown files are checked (with their anchors) by `markdown_refs`.
                if !path.ends_with(".md") {
                    out.push(path);
                }
            }
        }
    }
    out
}

/// GitHub-style heading anchors of a Markdown file.
fn anchors(markdown: &str) -> BTreeSet<String> {
    markdown
        .lines()
        .filter(|l| l.starts_with('#'))
        .map(|l| {
            l.trim_start_matches('#')
                .trim()
                .to_lowercase()
                .chars()
                .filter(|c| c.is_alphanumeric() || *c == ' ' || *c == '-' || *c == '_')
                .map(|c| if c == ' ' { '-' } else { c })
                .collect()
        })
        .collect()
}

/// `relative` resolved against the referring file's directory, then the root, then (for
/// sources, which write the generated pages under `docs/`) `docs/`; `None` when none
/// exists.
fn resolve(file: &str, relative: &str) -> Option<PathBuf> {
    let dir = Path::new(file).parent().unwrap_or(Path::new(""));
    let mut candidates = vec![root().join(dir).join(relative), root().join(relative)];
    if file.starts_with("src/") {
        candidates.push(root().join("docs").join(relative));
    }
    candidates.into_iter().find(|p| p.exists())
}

/// Every problem of one file, as readable lines.
fn problems_of(file: &str, text: &str) -> Vec<String> {
    let mut problems = Vec::new();
    let own_headings = anchors(text);
    for (n, line) in text.lines().enumerate() {
        let at = format!("{file}:{}", n + 1);
        if file.ends_with(".md") {
            for piece in line.split("](#").skip(1) {
                let anchor: String = piece
                    .chars()
                    .take_while(|c| c.is_ascii_alphanumeric() || "-_".contains(*c))
                    .collect();
                if !own_headings.contains(&anchor) {
                    problems.push(format!("{at}: no heading here for #{anchor}"));
                }
            }
        }
        for note in private_notes() {
            if line.contains(&note) {
                problems.push(format!(
                    "{at}: names {note}, which the repository does not ship"
                ));
            }
        }
        for (path, anchor) in markdown_refs(line) {
            if private_notes().iter().any(|n| path.ends_with(n.as_str())) {
                continue;
            }
            match resolve(file, &path) {
                None => problems.push(format!("{at}: {path} does not exist")),
                Some(target) => {
                    if let Some(anchor) = anchor.filter(|a| !a.is_empty()) {
                        let headings =
                            anchors(&std::fs::read_to_string(&target).unwrap_or_default());
                        if !headings.contains(&anchor) {
                            problems.push(format!("{at}: {path} has no heading for #{anchor}"));
                        }
                    }
                }
            }
        }
        for path in repository_paths(line) {
            if root().join(&path).exists() {
                continue;
            }
            problems.push(format!("{at}: {path} does not exist"));
        }
    }
    problems
}

#[test]
fn every_referenced_document_and_path_exists() {
    let mut failures = Vec::new();
    let mut scanned = 0;
    for file in tracked_files().into_iter().filter(|f| is_scanned(f)) {
        let Ok(text) = std::fs::read_to_string(root().join(&file)) else {
            continue;
        };
        scanned += 1;
        failures.extend(problems_of(&file, &text));
    }
    assert!(scanned > 50, "only {scanned} files scanned");
    assert!(
        failures.is_empty(),
        "references to documents or paths the repository does not have:\n  {}",
        failures.join("\n  ")
    );
}

/// The scanner finds what it is meant to find (so a pass above means something).
#[test]
fn the_scanner_catches_dangling_references() {
    let text = format!(
        "# Example\nsee docs/nowhere.md and [x](../docs/protocol.md#no-such-heading), {} and src/gone.rs;\n\
         fine: [p](protocol.md#capabilities), [e](#example), vectors/README.md, tests/fixtures/, docs/faults.md.\n\
         broken: [h](#nothing-here).",
        private_notes()[0]
    );
    let problems = problems_of("docs/example.md", &text);
    let joined = problems.join("\n");
    assert!(
        joined.contains("docs/nowhere.md does not exist"),
        "{joined}"
    );
    assert!(joined.contains("#no-such-heading"), "{joined}");
    assert!(joined.contains("does not ship"), "{joined}");
    assert!(joined.contains("src/gone.rs does not exist"), "{joined}");
    assert!(
        joined.contains("no heading here for #nothing-here"),
        "{joined}"
    );
    assert_eq!(problems.len(), 5, "{joined}");
}
