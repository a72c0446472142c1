//! The tree as an SVG diagram, for the web view's run page. The same look as the DOT
//! drawing (`dot.rs`): conditions are pale sage hexagons, leaves plain rectangles filled by
//! their class, edges read `holds` / `fails`, and the edge blank cells take is drawn thick
//! and says `blanks too` (so no meaning rides on colour alone). The layout is ours and needs
//! no Graphviz: leaves sit side by side in their left-to-right order, each condition above
//! the middle of its two children, one row per depth.
//!
//! Trees with more than [`MAX_DRAWN_LEAVES`] leaves are not drawn (`None`): past that a
//! diagram is no longer readable, and the text and DOT downloads still show them.

use std::fmt::Write as _;

use super::dot::{CLASS_FILLS, CONDITION_FILL, OUTLINE, VALUE_FILL};
use super::text::{branch_word, describe_test, prediction, rows_of};
use crate::data::Task;
use crate::tree::Tree;

/// The most leaves a diagram is drawn for.
pub const MAX_DRAWN_LEAVES: usize = 64;

/// Pixels per character of the 11 px monospace font, and the layout's spacing.
const CHAR_W: f64 = 6.7;
const LINE_H: f64 = 14.0;
const ROW_H: f64 = 92.0;
const GAP: f64 = 14.0;
const MARGIN: f64 = 12.0;

/// The tree as an SVG element (no XML declaration, so it can sit inside HTML), or `None`
/// when it has more than [`MAX_DRAWN_LEAVES`] leaves.
pub fn to_svg(tree: &Tree) -> Option<String> {
    if tree.nodes.is_empty() {
        return None;
    }
    let leaves = tree.nodes.iter().filter(|n| n.is_leaf()).count();
    if leaves > MAX_DRAWN_LEAVES {
        return None;
    }
    let labels: Vec<Vec<String>> = (0..tree.nodes.len()).map(|i| label(tree, i)).collect();
    let width_of = |i: usize| labels[i].iter().map(|l| l.chars().count()).max().unwrap_or(1) as f64 * CHAR_W + 16.0;
    // x of every node: leaves in order (left subtree first), conditions over their children.
    let mut x = vec![0.0f64; tree.nodes.len()];
    let mut next_left = MARGIN;
    // Postorder with an explicit stack: (node, children done).
    let mut stack = vec![(0usize, false)];
    while let Some((i, done)) = stack.pop() {
        let node = &tree.nodes[i];
        if node.is_leaf() {
            let w = width_of(i);
            x[i] = next_left + w / 2.0;
            next_left += w + GAP;
        } else if done {
            x[i] = (x[node.left as usize] + x[node.right as usize]) / 2.0;
        } else {
            stack.push((i, true));
            stack.push((node.right as usize, false));
            stack.push((node.left as usize, false));
        }
    }
    // A condition's label may be wider than its children's span: widen the picture to fit.
    let left_edge = (0..tree.nodes.len()).map(|i| x[i] - width_of(i) / 2.0).fold(f64::INFINITY, f64::min);
    let shift = if left_edge < MARGIN { MARGIN - left_edge } else { 0.0 };
    let right_edge = (0..tree.nodes.len()).map(|i| x[i] + shift + width_of(i) / 2.0).fold(0.0, f64::max);
    let depth = tree.nodes.iter().map(|n| n.depth).max().unwrap_or(0) as f64;
    let (w, h) = (right_edge + MARGIN, (depth + 1.0) * ROW_H + MARGIN);
    let y = |i: usize| MARGIN + tree.nodes[i].depth as f64 * ROW_H;
    let box_h = |i: usize| labels[i].len() as f64 * LINE_H + 8.0;

    let mut out = String::new();
    let _ = write!(
        out,
        r#"<svg xmlns="http://www.w3.org/2000/svg" class="tree" viewBox="0 0 {w:.0} {h:.0}" width="{w:.0}" height="{h:.0}" role="img" aria-label="the picked tree: {leaves} leaves" font-family="DejaVu Sans Mono, monospace" font-size="11">"#
    );
    // Edges first, so the boxes sit on top of them.
    for (i, node) in tree.nodes.iter().enumerate() {
        let Some(split) = &node.split else { continue };
        for (child, left) in [(node.left as usize, true), (node.right as usize, false)] {
            let blanks = left == split.missing_left;
            let (x1, y1, x2, y2) = (x[i] + shift, y(i) + box_h(i), x[child] + shift, y(child));
            let stroke = if blanks { 2.6 } else { 1.0 };
            let _ = write!(out, r#"<line x1="{x1:.1}" y1="{y1:.1}" x2="{x2:.1}" y2="{y2:.1}" stroke="{OUTLINE}" stroke-width="{stroke}"/>"#);
            let word = if blanks { format!("{}, blanks too", branch_word(left)) } else { branch_word(left).to_string() };
            let (mx, my) = ((x1 + x2) / 2.0, (y1 + y2) / 2.0 + 4.0);
            let anchor = if left { "end" } else { "start" };
            let dx = if left { -4.0 } else { 4.0 };
            let weight = if blanks { r#" font-weight="bold""# } else { "" };
            let _ = write!(out, r#"<text x="{:.1}" y="{my:.1}" text-anchor="{anchor}" font-size="10"{weight}>{}</text>"#, mx + dx, esc(&word));
        }
    }
    for (i, node) in tree.nodes.iter().enumerate() {
        let (cx, top, bw, bh) = (x[i] + shift, y(i), width_of(i), box_h(i));
        let (l, r) = (cx - bw / 2.0, cx + bw / 2.0);
        match &node.split {
            Some(_) => {
                let cut = 8.0;
                let _ = write!(
                    out,
                    r#"<polygon points="{:.1},{top:.1} {:.1},{top:.1} {r:.1},{:.1} {:.1},{:.1} {:.1},{:.1} {l:.1},{:.1}" fill="{CONDITION_FILL}" stroke="{OUTLINE}"/>"#,
                    l + cut,
                    r - cut,
                    top + bh / 2.0,
                    r - cut,
                    top + bh,
                    l + cut,
                    top + bh,
                    top + bh / 2.0
                );
            }
            None => {
                let fill = match tree.task {
                    Task::Classify => CLASS_FILLS[tree.leaf_class(i as u32) as usize % CLASS_FILLS.len()],
                    Task::Regress => VALUE_FILL,
                };
                let _ = write!(out, r#"<rect x="{l:.1}" y="{top:.1}" width="{bw:.1}" height="{bh:.1}" fill="{fill}" stroke="{OUTLINE}"/>"#);
            }
        }
        for (k, line) in labels[i].iter().enumerate() {
            let ty = top + 4.0 + LINE_H * (k as f64 + 1.0) - 3.0;
            let _ = write!(out, r#"<text x="{cx:.1}" y="{ty:.1}" text-anchor="middle">{}</text>"#, esc(line));
        }
    }
    out.push_str("</svg>");
    Some(out)
}

/// A node's lines: the test and its rows, or `leaf: prediction` and its rows.
fn label(tree: &Tree, i: usize) -> Vec<String> {
    match &tree.nodes[i].split {
        Some(split) => vec![describe_test(tree, split), rows_of(tree, i)],
        None => vec![format!("leaf: {}", prediction(tree, i)), rows_of(tree, i)],
    }
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::super::text::tests::{classify_tree, regress_tree};
    use super::*;

    #[test]
    fn draws_every_node_with_our_words() {
        for tree in [classify_tree(), regress_tree()] {
            let svg = to_svg(&tree).unwrap();
            let doc = roxmltree::Document::parse(&svg).unwrap();
            let boxes = doc.descendants().filter(|n| n.has_tag_name("rect") || n.has_tag_name("polygon")).count();
            assert_eq!(boxes, tree.nodes.len());
            let leaves = tree.nodes.iter().filter(|n| n.is_leaf()).count();
            assert_eq!(svg.matches(">leaf: ").count(), leaves);
            let splits = tree.nodes.len() - leaves;
            assert_eq!(svg.matches(">holds").count() + svg.matches(">fails").count(), 2 * splits);
            assert_eq!(svg.matches("blanks too").count(), splits);
        }
    }
}
