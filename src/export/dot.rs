//! The Graphviz DOT model rendering.
//!
//! A `digraph` with one node statement per tree node, named `n<id>` after the node's index
//! in the model (the nodes are stored in preorder, so ids run n0, n1, … down the left
//! subtree first). Internal nodes are plain grey boxes showing their test and rows; leaves are
//! rounded boxes, tinted by predicted class, showing the prediction and rows. The two edges
//! of a split are labelled `yes` (the test holds) and `no`; the edge that missing cells take
//! also says `+ missing`. The graph's caption is the one-line summary of the text rendering.
//!
//! Tests, predictions and shares read exactly as in [`super::text`]. Every label is a quoted
//! DOT string: `"` and `\` are escaped, and the only other backslash sequence written is the
//! `\n` line break between label lines.

use std::fmt::Write as _;

use super::text::{describe_test, prediction, rows_of, summary};
use crate::data::Task;
use crate::tree::Tree;

/// Fill of internal nodes.
const SPLIT_FILL: &str = "#f1f1f1";
/// Fill of regress leaves.
const VALUE_FILL: &str = "#dcebf7";
/// Leaf fills by predicted class code, reused in turn when there are more classes.
const CLASS_FILLS: [&str; 8] = ["#dcebf7", "#fbe3cd", "#dcf0d5", "#f5d9e6", "#e6def2", "#fdf3c4", "#d6efee", "#ece1d6"];

/// Renders a tree as a Graphviz DOT `digraph`.
pub fn to_dot(tree: &Tree) -> String {
    let mut out = String::new();
    out.push_str("digraph pollard_model {\n");
    let _ = writeln!(out, "  graph [label={}, labelloc=b, fontname=\"Helvetica\", fontsize=11];", quote(&[summary(tree)]));
    out.push_str("  node [shape=box, fontname=\"Helvetica\", fontsize=11, color=\"#6b6b6b\"];\n");
    out.push_str("  edge [fontname=\"Helvetica\", fontsize=10, color=\"#6b6b6b\"];\n");
    // Preorder with an explicit stack, so deep trees cannot overflow.
    let mut stack = vec![0usize];
    while let Some(i) = stack.pop() {
        let node = &tree.nodes[i];
        match &node.split {
            Some(split) => {
                let label = quote(&[describe_test(tree, split), rows_of(tree, i)]);
                let _ = writeln!(out, "  n{i} [style=filled, fillcolor=\"{SPLIT_FILL}\", label={label}];");
                let (yes, no) = if split.missing_left { ("yes\\n+ missing", "no") } else { ("yes", "no\\n+ missing") };
                let _ = writeln!(out, "  n{i} -> n{} [label=\"{yes}\"];", node.left);
                let _ = writeln!(out, "  n{i} -> n{} [label=\"{no}\"];", node.right);
                stack.push(node.right as usize);
                stack.push(node.left as usize);
            }
            None => {
                let fill = match tree.task {
                    Task::Classify => CLASS_FILLS[tree.leaf_class(i as u32) as usize % CLASS_FILLS.len()],
                    Task::Regress => VALUE_FILL,
                };
                let label = quote(&[prediction(tree, i), rows_of(tree, i)]);
                let _ = writeln!(out, "  n{i} [style=\"rounded,filled\", fillcolor=\"{fill}\", label={label}];");
            }
        }
    }
    out.push_str("}\n");
    out
}

/// Label lines as one quoted DOT string, lines joined by `\n`.
fn quote(lines: &[String]) -> String {
    let mut s = String::from("\"");
    for (k, line) in lines.iter().enumerate() {
        if k > 0 {
            s.push_str("\\n");
        }
        escape_into(&mut s, line);
    }
    s.push('"');
    s
}

/// Escapes text for the inside of a quoted DOT string: `"` and `\` get a backslash, so
/// Graphviz shows them as they are and reads no escape sequence into them; a line break
/// (there should be none: names are cleaned first) becomes `\n`.
fn escape_into(out: &mut String, text: &str) {
    for c in text.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c if c.is_control() => out.push(' '),
            c => out.push(c),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::export::text::tests::{classify_tree, hand_tree, regress_tree};

    /// Node statements: lines `n<digits> [`.
    fn node_ids(dot: &str) -> Vec<usize> {
        dot.lines()
            .filter_map(|l| {
                let rest = l.trim_start().strip_prefix('n')?;
                let (id, tail) = rest.split_once(' ')?;
                tail.starts_with('[').then(|| id.parse().ok())?
            })
            .collect()
    }

    /// Reads DOT as its lexer would: outside quoted strings braces and brackets must nest,
    /// inside them a backslash takes the next character with it, and no string may run past
    /// the end of its line (we never write multi-line strings). Returns the quoted strings.
    fn check_syntax(dot: &str) -> Vec<String> {
        let mut strings = Vec::new();
        let mut depth: Vec<char> = Vec::new();
        for (n, line) in dot.lines().enumerate() {
            let mut chars = line.chars();
            while let Some(c) = chars.next() {
                match c {
                    '"' => {
                        let mut s = String::new();
                        loop {
                            match chars.next() {
                                None => panic!("line {}: the quoted string does not end: {line}", n + 1),
                                Some('"') => break,
                                Some('\\') => {
                                    s.push('\\');
                                    s.push(chars.next().unwrap_or_else(|| panic!("line {}: dangling backslash", n + 1)));
                                }
                                Some(c) => s.push(c),
                            }
                        }
                        strings.push(s);
                    }
                    '{' | '[' => depth.push(c),
                    '}' => assert_eq!(depth.pop(), Some('{'), "line {}: {line}", n + 1),
                    ']' => assert_eq!(depth.pop(), Some('['), "line {}: {line}", n + 1),
                    _ => {}
                }
            }
        }
        assert!(depth.is_empty(), "unclosed {depth:?}");
        strings
    }

    /// Undoes [`escape_into`] the way Graphviz shows a label: `\\` and `\"` stand for the
    /// character, `\n` breaks the line.
    fn shown(s: &str) -> String {
        let mut out = String::new();
        let mut chars = s.chars();
        while let Some(c) = chars.next() {
            if c == '\\' {
                match chars.next() {
                    Some('n') => out.push('\n'),
                    Some(c) => out.push(c),
                    None => panic!("dangling backslash"),
                }
            } else {
                out.push(c);
            }
        }
        out
    }

    #[test]
    fn one_statement_per_node_in_preorder() {
        for tree in [classify_tree(), regress_tree(), hand_tree()] {
            let dot = to_dot(&tree);
            assert!(dot.starts_with("digraph pollard_model {\n") && dot.ends_with("}\n"), "{dot}");
            let ids = node_ids(&dot);
            assert_eq!(ids.len(), tree.nodes.len(), "{dot}");
            assert_eq!(ids, (0..tree.nodes.len()).collect::<Vec<_>>(), "{dot}");
            let edges = dot.lines().filter(|l| l.contains(" -> ")).count();
            assert_eq!(edges, tree.nodes.len() - 1);
            check_syntax(&dot);
        }
    }

    #[test]
    fn labels_with_quotes_braces_and_backslashes_are_escaped() {
        let tree = hand_tree();
        let dot = to_dot(&tree);
        let strings = check_syntax(&dot);
        let labels: Vec<String> = strings.iter().map(|s| shown(s)).collect();
        let root = "shade in {a\"b{c}, <b>, c\\, line\\nbreak, s4, s5, s6, s7, … (+2 more)}\n8 rows (100%)";
        assert!(labels.iter().any(|l| l == root), "{dot}");
        assert!(dot.contains(r#"label="shade in {a\"b{c}, <b>, c\\, line\\nbreak,"#), "{dot}");
        assert!(labels.iter().any(|l| l == "hi\"gh 100%\n3 rows (37.5%)"), "{dot}");
        assert!(labels.iter().any(|l| l == "x is present\n5 rows (62.5%)"), "{dot}");
        assert!(labels.iter().any(|l| l == "3 leaves, depth 2, 8 rows; target grade \"A\" (classify)"), "{dot}");
        // The root sends missing cells left, its left child right.
        assert!(dot.contains("  n0 -> n1 [label=\"yes\\n+ missing\"];\n  n0 -> n4 [label=\"no\"];\n"), "{dot}");
        assert!(dot.contains("  n1 -> n2 [label=\"yes\"];\n  n1 -> n3 [label=\"no\\n+ missing\"];\n"), "{dot}");
    }

    #[test]
    fn fitted_trees_show_tests_and_predictions() {
        let tree = classify_tree();
        let dot = to_dot(&tree);
        let labels: Vec<String> = check_syntax(&dot).iter().map(|s| shown(s)).collect();
        assert!(labels.iter().any(|l| l.starts_with("colour in {")), "{dot}");
        assert!(labels.iter().any(|l| l.starts_with("length <= ")), "{dot}");
        for leaf in tree.leaves() {
            let line = dot.lines().find(|l| l.starts_with(&format!("  n{leaf} ["))).unwrap();
            let label = &tree.labels[tree.leaf_class(leaf) as usize];
            assert!(line.contains("rounded") && line.contains(&format!("label=\"{label} 100%\\n")), "{line}");
        }
        let dot = to_dot(&regress_tree());
        assert!(dot.contains("label=\"mean 1.5\\n9 rows (60%)\""), "{dot}");
        assert!(dot.contains("label=\"mean 10.5\\n6 rows (40%)\""), "{dot}");
        assert!(dot.contains("  n0 [style=filled, fillcolor=\"#f1f1f1\", label=\"length <= 5\\n15 rows (100%)\"];"), "{dot}");
    }

    #[test]
    fn dot_is_deterministic() {
        assert_eq!(to_dot(&classify_tree()), to_dot(&classify_tree()));
        assert_eq!(to_dot(&regress_tree()), to_dot(&regress_tree()));
    }
}
