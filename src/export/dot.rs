//! The Graphviz DOT model rendering.
//!
//! A `digraph` with one node statement per tree node, named `n<id>` after the node's index
//! in the model (the nodes are stored in preorder, so ids run n0, n1, … down the left
//! subtree first). Our own look (see DEVELOPERS.md, "Our look"):
//! - a condition is a pale sage hexagon showing its test and rows;
//! - a leaf is a plain rectangle whose width grows with its share of the training rows,
//!   filled by predicted class from a muted green, mauve and straw palette, showing the
//!   prediction, the class mix in words (classify) and rows;
//! - the two edges of a condition read `holds` (the test is true) and `fails`; the edge that
//!   blank cells take is drawn bold and says `blanks too`.
//! The graph's caption is the one-line summary of the text rendering.
//!
//! Tests, predictions and shares read exactly as in [`super::text`]. Every label is a quoted
//! DOT string: `"` and `\` are escaped, and the only other backslash sequence written is the
//! `\n` line break between label lines.

use std::fmt::Write as _;

use super::text::{branch_word, clean, describe_test, percent, prediction, rows_of, summary};
use crate::data::Task;
use crate::tree::Tree;

/// Fill and outline of conditions.
pub(crate) const CONDITION_FILL: &str = "#eef0e6";
pub(crate) const OUTLINE: &str = "#55604a";
/// Fill of regress leaves.
pub(crate) const VALUE_FILL: &str = "#e2ead9";
/// Leaf fills by predicted class code, reused in turn when there are more classes: muted
/// sage, mauve, straw, sea-glass, clay, lavender, moss and rose.
pub(crate) const CLASS_FILLS: [&str; 8] = ["#d8e8c8", "#e8d3ea", "#f3ecc2", "#cfe3df", "#eadbcf", "#dcdcef", "#e3e8b8", "#f0d6d6"];
/// Most classes a leaf's mix names before summing up the rest.
const MIX_LISTED: usize = 3;

/// Renders a tree as a Graphviz DOT `digraph`.
pub fn to_dot(tree: &Tree) -> String {
    let mut out = String::new();
    out.push_str("digraph pollard_model {\n");
    let _ = writeln!(out, "  graph [label={}, labelloc=t, fontname=\"DejaVu Sans Mono\", fontsize=10, nodesep=0.3, ranksep=0.45];", quote(&[summary(tree)]));
    let _ = writeln!(out, "  node [fontname=\"DejaVu Sans Mono\", fontsize=10, color=\"{OUTLINE}\", penwidth=0.8];");
    let _ = writeln!(out, "  edge [fontname=\"DejaVu Sans Mono\", fontsize=9, color=\"{OUTLINE}\", arrowsize=0.6];");
    let all = tree.nodes.first().map_or(0, |n| n.rows).max(1) as f64;
    // Preorder with an explicit stack, so deep trees cannot overflow.
    let mut stack = vec![0usize];
    while let Some(i) = stack.pop() {
        let node = &tree.nodes[i];
        match &node.split {
            Some(split) => {
                let label = quote(&[describe_test(tree, split), rows_of(tree, i)]);
                let _ = writeln!(out, "  n{i} [shape=hexagon, style=filled, fillcolor=\"{CONDITION_FILL}\", label={label}];");
                for (child, left) in [(node.left, true), (node.right, false)] {
                    let word = branch_word(left);
                    if left == split.missing_left {
                        let _ = writeln!(out, "  n{i} -> n{child} [label=\"{word}\\nblanks too\", style=bold];");
                    } else {
                        let _ = writeln!(out, "  n{i} -> n{child} [label=\"{word}\"];");
                    }
                }
                stack.push(node.right as usize);
                stack.push(node.left as usize);
            }
            None => {
                let fill = match tree.task {
                    Task::Classify => CLASS_FILLS[tree.leaf_class(i as u32) as usize % CLASS_FILLS.len()],
                    Task::Regress => VALUE_FILL,
                };
                let mut lines = vec![prediction(tree, i)];
                if tree.task == Task::Classify {
                    lines.extend(class_mix(tree, i));
                }
                lines.push(rows_of(tree, i));
                // The share of training rows sets the width: 1 inch for a tiny leaf, 3 for all.
                let width = 1.0 + 2.0 * node.rows as f64 / all;
                let _ = writeln!(out, "  n{i} [shape=rect, style=filled, fillcolor=\"{fill}\", width={width:.2}, label={}];", quote(&lines));
            }
        }
    }
    out.push_str("}\n");
    out
}

/// A mixed leaf's classes in words, largest share first (lowest class code on ties), those
/// with no rows left out: `scrap 60% · keep 40%`; `None` for a pure leaf.
fn class_mix(tree: &Tree, node: usize) -> Option<String> {
    let shares = tree.value(node);
    let mut order: Vec<usize> = (0..shares.len()).filter(|&c| shares[c] > 0.0).collect();
    order.sort_by(|&a, &b| shares[b].total_cmp(&shares[a]).then(a.cmp(&b)));
    let mut parts: Vec<String> = order
        .iter()
        .take(MIX_LISTED)
        .map(|&c| format!("{} {}", tree.labels.get(c).map_or_else(|| format!("class {c}"), |l| clean(l)), percent(shares[c])))
        .collect();
    if order.len() < 2 {
        return None;
    }
    if order.len() > MIX_LISTED {
        parts.push(format!("+{} more", order.len() - MIX_LISTED));
    }
    Some(parts.join(" · "))
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
        // The root sends blank cells left, its left child right; the mixed leaf names its mix.
        assert!(labels.iter().any(|l| l == "lo{w} 66.7%\nlo{w} 66.7% · hi\"gh 33.3%\n3 rows (37.5%)"), "{dot}");
        assert!(dot.contains("  n0 -> n1 [label=\"holds\\nblanks too\", style=bold];\n  n0 -> n4 [label=\"fails\"];\n"), "{dot}");
        assert!(dot.contains("  n1 -> n2 [label=\"holds\"];\n  n1 -> n3 [label=\"fails\\nblanks too\", style=bold];\n"), "{dot}");
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
            assert!(line.contains("shape=rect") && line.contains(&format!("label=\"{label} 100%\\n")), "{line}");
        }
        let dot = to_dot(&regress_tree());
        assert!(dot.contains("label=\"mean 1.5\\n9 rows (60%)\""), "{dot}");
        assert!(dot.contains("label=\"mean 10.5\\n6 rows (40%)\""), "{dot}");
        assert!(dot.contains("  n0 [shape=hexagon, style=filled, fillcolor=\"#eef0e6\", label=\"length <= 5\\n15 rows (100%)\"];"), "{dot}");
        // Leaf width follows the share of rows: 9 of 15 rows is 1 + 2 × 0.6 inches.
        assert!(dot.contains("width=2.20, label=\"mean 1.5\\n9 rows (60%)\""), "{dot}");
    }

    #[test]
    fn dot_is_deterministic() {
        assert_eq!(to_dot(&classify_tree()), to_dot(&classify_tree()));
        assert_eq!(to_dot(&regress_tree()), to_dot(&regress_tree()));
    }
}
