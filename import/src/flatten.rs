//! Trees as files store them (node ids in any order, leaves apart) turned
//! into the estimator's node lists, where every child comes after its
//! parent. A file whose "tree" reaches a node twice or loops is refused.

use paddock_guest::Node;

/// Walks a tree from `root` in depth-first order, left first, asking
/// `node` for each file id it reaches (a node whose children are still
/// file ids), and renumbers children so each
/// follows its parent. `size` is the number of nodes the file declares:
/// reaching more than that means a node is reached twice.
///
/// # Errors
/// The message of `node`'s error, or `"a node is reached twice (the
/// children do not form a tree)"`.
pub(crate) fn flatten<E>(
    root: u32,
    size: usize,
    mut node: impl FnMut(u32) -> Result<Node, E>,
    cycle: impl FnOnce() -> E,
) -> Result<Vec<Node>, E> {
    let mut out: Vec<Node> = Vec::new();
    // (file id, where its new index goes: parent and which side)
    let mut stack: Vec<(u32, Option<(usize, bool)>)> = vec![(root, None)];
    while let Some((id, parent)) = stack.pop() {
        if out.len() >= size.max(1) {
            return Err(cycle());
        }
        let at = out.len() as u32;
        if let Some((p, left)) = parent
            && let Some((l, r)) = children(&mut out[p])
        {
            *(if left { l } else { r }) = at;
        }
        let raw = node(id)?;
        let kids = match raw {
            Node::Split { left, right, .. }
            | Node::SplitZeroAbsent { left, right, .. }
            | Node::Member { left, right, .. } => Some((left, right)),
            Node::Leaf { .. } | Node::Leaves { .. } => None,
        };
        out.push(raw);
        if let Some((left, right)) = kids {
            stack.push((right, Some((at as usize, false))));
            stack.push((left, Some((at as usize, true))));
        }
    }
    Ok(out)
}

fn children(node: &mut Node) -> Option<(&mut u32, &mut u32)> {
    match node {
        Node::Split { left, right, .. }
        | Node::SplitZeroAbsent { left, right, .. }
        | Node::Member { left, right, .. } => Some((left, right)),
        Node::Leaf { .. } | Node::Leaves { .. } => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use paddock_guest::Branch;

    fn split(left: u32, right: u32) -> Node {
        Node::Split { feature: 0, threshold: 0.0, left, right, missing: Branch::Left }
    }

    /// A file tree whose root is id 2, with children 0 (leaf) and 1 (leaf):
    /// renumbered root first, then left, then right.
    #[test]
    fn children_come_after_their_parent() {
        let file = [Node::Leaf { value: 1.0 }, Node::Leaf { value: 2.0 }, split(0, 1)];
        let out = flatten(2, 3, |id| Ok::<_, String>(file[id as usize]), || "cycle".to_owned()).unwrap();
        assert_eq!(out, vec![split(1, 2), Node::Leaf { value: 1.0 }, Node::Leaf { value: 2.0 }]);
    }

    #[test]
    fn a_loop_is_refused() {
        let file = [split(1, 2), split(0, 2), Node::Leaf { value: 0.0 }];
        let err = flatten(0, 3, |id| Ok::<_, String>(file[id as usize]), || "cycle".to_owned()).unwrap_err();
        assert_eq!(err, "cycle");
    }
}
