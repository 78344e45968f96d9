//! The open sub-domains of one tree, lowest bound first, with the bookkeeping that keeps the tree's
//! overall bound sound: every sub-domain is either open here or folded into the smallest bound of the
//! closed ones, so `min(closed, lowest open)` is a lower bound on the whole region.
//!
//! The frontier also knows what one open sub-domain costs in memory (an estimate from its shape: split
//! state, pre-activation bounds, minimiser, heap slot), so the tree can stop before a cap is exceeded.

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use crate::bound::{LayerBounds, ReluSplit, SplitState};
use crate::engine::slopes::Warm;

/// A sub-domain waiting to be processed.
#[derive(Debug, Clone)]
pub(crate) struct Node {
    /// The split constraints.
    pub splits: SplitState,
    /// Sound pre-activation bounds on the sub-domain.
    pub bounds: Vec<LayerBounds>,
    /// Sound margin lower bound on the sub-domain.
    pub lower: f64,
    /// Region point minimising the node's linear bound (a promising start for the attack).
    pub minimiser: Option<Vec<f64>>,
    /// The slopes and split multipliers of the node's best optimised bound (its children's start).
    pub warm: Option<Warm>,
}

impl Node {
    /// True when every free unit is stable under the node's bounds (the network is affine on it).
    pub fn is_leaf(&self) -> bool {
        self.splits
            .layers
            .iter()
            .zip(&self.bounds)
            .all(|(splits, bounds)| {
                splits.iter().enumerate().all(|(i, s)| {
                    *s != ReluSplit::Free || bounds.lower[i] >= 0.0 || bounds.upper[i] <= 0.0
                })
            })
    }
}

/// Heap entry: reversed order, so the max-heap pops the lowest bound first.
#[derive(Debug)]
struct Entry(Node);

impl PartialEq for Entry {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == Ordering::Equal
    }
}
impl Eq for Entry {}
impl PartialOrd for Entry {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Entry {
    fn cmp(&self, other: &Self) -> Ordering {
        other.0.lower.total_cmp(&self.0.lower)
    }
}

/// Open and closed sub-domains of one tree.
#[derive(Debug)]
pub(crate) struct Frontier {
    queue: BinaryHeap<Entry>,
    /// Smallest sound bound of the closed (pruned, solved or emptied) sub-domains.
    closed_lower: f64,
    node_bytes: usize,
}

impl Frontier {
    /// An empty frontier for nodes of a network with `hidden` unit counts and `inputs` inputs.
    pub fn new(hidden: &[usize], inputs: usize) -> Frontier {
        let units: usize = hidden.iter().sum();
        let vector = std::mem::size_of::<Vec<f64>>();
        let per_layer = 3 * vector + std::mem::size_of::<LayerBounds>();
        // Two heap slots per node (the heap doubles its capacity), 1 byte per split, 16 per bound pair,
        // and about 16 bytes of allocator overhead for each of the 3 + 3·layers allocations.
        // The warm start: a slope and a multiplier per unit, 2·layers vectors.
        let node_bytes = 2 * std::mem::size_of::<Entry>()
            + 2 * vector
            + hidden.len() * per_layer
            + units * 17
            + inputs * 8
            + (3 + 3 * hidden.len()) * 16
            + std::mem::size_of::<Warm>()
            + 2 * hidden.len() * (vector + 16)
            + units * 16;
        Frontier {
            queue: BinaryHeap::new(),
            closed_lower: f64::INFINITY,
            node_bytes,
        }
    }

    /// Estimated bytes one open node takes.
    pub fn node_bytes(&self) -> usize {
        self.node_bytes
    }

    /// Number of open nodes.
    pub fn len(&self) -> usize {
        self.queue.len()
    }

    /// True when no node is open.
    pub fn is_empty(&self) -> bool {
        self.queue.is_empty()
    }

    /// The lowest open bound (`+∞` when none is open).
    pub fn lowest_open(&self) -> f64 {
        self.queue.peek().map_or(f64::INFINITY, |e| e.0.lower)
    }

    /// The node with the lowest bound.
    pub fn peek(&self) -> Option<&Node> {
        self.queue.peek().map(|e| &e.0)
    }

    /// Removes the node with the lowest bound.
    pub fn pop(&mut self) -> Option<Node> {
        self.queue.pop().map(|e| e.0)
    }

    /// Opens a node.
    pub fn push(&mut self, node: Node) {
        self.queue.push(Entry(node));
    }

    /// Records a closed sub-domain's sound bound.
    pub fn close(&mut self, lower: f64) {
        self.closed_lower = self.closed_lower.min(lower);
    }

    /// Smallest sound bound of the closed sub-domains.
    pub fn closed_lower(&self) -> f64 {
        self.closed_lower
    }

    /// The open nodes in no particular order.
    #[cfg(test)]
    pub fn iter(&self) -> impl Iterator<Item = &Node> {
        self.queue.iter().map(|e| &e.0)
    }

    /// Closes every open node.
    pub fn close_all(&mut self) {
        while let Some(node) = self.pop() {
            self.close(node.lower);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn node(lower: f64, bounds: (f64, f64)) -> Node {
        Node {
            splits: SplitState {
                layers: vec![vec![ReluSplit::Free]],
            },
            bounds: vec![LayerBounds {
                lower: vec![bounds.0],
                upper: vec![bounds.1],
            }],
            lower,
            minimiser: None,
            warm: None,
        }
    }

    #[test]
    fn lowest_bound_first_and_closed_bounds_kept() {
        let mut frontier = Frontier::new(&[1], 2);
        for lower in [0.5, -1.0, 0.0] {
            frontier.push(node(lower, (-1.0, 1.0)));
        }
        assert_eq!(frontier.lowest_open(), -1.0);
        let first = frontier.pop().unwrap();
        frontier.close(first.lower);
        assert_eq!(frontier.pop().unwrap().lower, 0.0);
        assert_eq!(frontier.closed_lower(), -1.0);
        assert_eq!(frontier.len(), 1);
        assert!(frontier.node_bytes() > 17 + 16);
    }

    #[test]
    fn leaves_have_no_unstable_free_unit() {
        assert!(!node(0.0, (-1.0, 1.0)).is_leaf());
        assert!(node(0.0, (0.0, 1.0)).is_leaf());
        let mut split = node(0.0, (-1.0, 1.0));
        split.splits.layers[0][0] = ReluSplit::Active;
        assert!(split.is_leaf());
    }
}
