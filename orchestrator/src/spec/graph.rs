//! The cycle graph: stages as petgraph nodes, same-iteration input edges (which must form a
//! DAG) and previous-iteration edges kept explicit; gives the stage order within an iteration.

use petgraph::algo::toposort;
use petgraph::graph::DiGraph;

use super::model::{Source, Stage};

/// Kind of dependency between two stages.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Edge {
    /// Within one iteration.
    Same,
    /// From the previous iteration.
    Previous,
}

/// All edges `(from, to, kind)` between stage names.
pub fn edges(stages: &[Stage]) -> Vec<(String, String, Edge)> {
    let mut out = Vec::new();
    for s in stages {
        for (_, src) in &s.inputs {
            match src {
                Source::Same { stage, .. } => out.push((stage.clone(), s.name.clone(), Edge::Same)),
                Source::Previous { stage, .. } => {
                    out.push((stage.clone(), s.name.clone(), Edge::Previous))
                }
                Source::Start(_) | Source::Before { .. } | Source::Points { .. } => {}
            }
        }
    }
    out
}

/// Stages in an order where every same-iteration input comes first (file order breaks ties).
/// On a cycle, returns the name of a stage on it.
pub fn order(stages: &[Stage]) -> Result<Vec<Stage>, String> {
    let mut g = DiGraph::<usize, ()>::new();
    let nodes: Vec<_> = (0..stages.len()).map(|i| g.add_node(i)).collect();
    for (from, to, kind) in edges(stages) {
        if kind != Edge::Same {
            continue;
        }
        let (Some(a), Some(b)) = (
            stages.iter().position(|s| s.name == from),
            stages.iter().position(|s| s.name == to),
        ) else {
            continue;
        };
        if a == b {
            return Err(stages[a].name.clone());
        }
        g.add_edge(nodes[a], nodes[b], ());
    }
    // petgraph's toposort detects cycles; for a stable order we then take Kahn's algorithm
    // choosing the earliest stage of the file among those ready.
    toposort(&g, None).map_err(|c| stages[g[c.node_id()]].name.clone())?;
    let mut indeg: Vec<usize> = nodes
        .iter()
        .map(|n| {
            g.neighbors_directed(*n, petgraph::Direction::Incoming)
                .count()
        })
        .collect();
    let mut done = vec![false; stages.len()];
    let mut out = Vec::new();
    while out.len() < stages.len() {
        let Some(i) = (0..stages.len()).find(|&i| !done[i] && indeg[i] == 0) else {
            break;
        };
        done[i] = true;
        for n in g.neighbors_directed(nodes[i], petgraph::Direction::Outgoing) {
            indeg[g[n]] -= 1;
        }
        out.push(stages[i].clone());
    }
    Ok(out)
}
