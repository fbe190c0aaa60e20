//! The stage graph and its expansion into units.
//!
//! Stages form a DAG (petgraph) whose edges run from a stage to its consumers. The topological
//! order is *stable*: among stages that are ready at the same time, the one written first in the
//! file comes first, so manifests and plan listings do not reorder when an unrelated stage is
//! added. A cycle is reported with the stages on it, in order.
//!
//! A *unit* is one stage × one subject. Every stage of a per-recording chain expands into one unit
//! per subject; a stage whose op joins subjects, and every stage downstream of it, is a *group*
//! stage with a single unit (subject `None`) that takes the units of all subjects as inputs.

use std::collections::BTreeSet;

use petgraph::algo::tarjan_scc;
use petgraph::graph::{DiGraph, NodeIndex};

/// The order of stages, or the cycle that prevents one.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StageGraph {
    /// Stage indices in topological order.
    pub order: Vec<usize>,
    /// For every stage, the stages that consume it.
    pub consumers: Vec<Vec<usize>>,
}

/// Stages on a dependency cycle, in order, the first repeated at the end (`a → b → a`).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Cycle(pub Vec<usize>);

impl StageGraph {
    /// Build from each stage's input stages (indices into the same list).
    pub fn build(inputs: &[Vec<usize>]) -> Result<StageGraph, Cycle> {
        let mut graph = DiGraph::<usize, ()>::new();
        let nodes: Vec<NodeIndex> = (0..inputs.len()).map(|i| graph.add_node(i)).collect();
        let mut consumers = vec![Vec::new(); inputs.len()];
        for (stage, ins) in inputs.iter().enumerate() {
            for &input in ins {
                graph.add_edge(nodes[input], nodes[stage], ());
                consumers[input].push(stage);
            }
        }
        match stable_order(inputs, &consumers) {
            Some(order) => Ok(StageGraph { order, consumers }),
            None => Err(find_cycle(&graph, inputs)),
        }
    }
}

/// Kahn's algorithm, always taking the ready stage written first.
fn stable_order(inputs: &[Vec<usize>], consumers: &[Vec<usize>]) -> Option<Vec<usize>> {
    let mut missing: Vec<usize> = inputs.iter().map(Vec::len).collect();
    let mut ready: BTreeSet<usize> = (0..inputs.len()).filter(|&i| missing[i] == 0).collect();
    let mut order = Vec::with_capacity(inputs.len());
    while let Some(next) = ready.pop_first() {
        order.push(next);
        for &c in &consumers[next] {
            missing[c] -= 1;
            if missing[c] == 0 {
                ready.insert(c);
            }
        }
    }
    (order.len() == inputs.len()).then_some(order)
}

/// A cycle inside the first strongly connected component that has one.
fn find_cycle(graph: &DiGraph<usize, ()>, inputs: &[Vec<usize>]) -> Cycle {
    for component in tarjan_scc(graph) {
        let members: BTreeSet<usize> = component.iter().map(|n| graph[*n]).collect();
        let self_loop = members.len() == 1 && members.iter().all(|&m| inputs[m].contains(&m));
        if members.len() > 1 || self_loop {
            return Cycle(walk_cycle(&members, inputs));
        }
    }
    Cycle(Vec::new())
}

/// Follow input edges inside a strongly connected component until a stage repeats, then list
/// the stages in data-flow order.
fn walk_cycle(members: &BTreeSet<usize>, inputs: &[Vec<usize>]) -> Vec<usize> {
    let Some(&start) = members.iter().next() else {
        return Vec::new();
    };
    let mut path = vec![start];
    let mut current = start;
    loop {
        let Some(&next) = inputs[current].iter().find(|i| members.contains(i)) else {
            return path;
        };
        if let Some(pos) = path.iter().position(|&p| p == next) {
            let mut cycle: Vec<usize> = path[pos..].to_vec();
            cycle.push(next);
            cycle.reverse();
            return cycle;
        }
        path.push(next);
        current = next;
    }
}

/// Where a unit's input comes from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum UnitInput {
    /// The recording of subject `n` (index into the subject list).
    Source(usize),
    /// Another unit (index into the unit list).
    Unit(usize),
}

/// One stage × one subject (or the group).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Unit {
    /// Index of the stage.
    pub stage: usize,
    /// Index of the subject, `None` for group units.
    pub subject: Option<usize>,
    /// The inputs, in the order the op receives them.
    pub inputs: Vec<UnitInput>,
}

/// What the expansion needs to know about each stage.
#[derive(Clone, Debug)]
pub struct StageShape {
    /// Input stages, `None` for the data source.
    pub inputs: Vec<Option<usize>>,
    /// True for group stages (joining, or downstream of a join).
    pub group: bool,
}

/// Expand stages (given in topological order) into units: per-subject stages once per subject
/// in subject order, group stages once. Units come out in topological stage order, then subject.
pub fn expand(order: &[usize], stages: &[StageShape], subjects: usize) -> Vec<Unit> {
    let mut units: Vec<Unit> = Vec::new();
    // unit_of[stage][subject or 0] → unit index
    let mut unit_of: Vec<Vec<usize>> = vec![Vec::new(); stages.len()];
    for &stage in order {
        let shape = &stages[stage];
        let subjects_of_stage: Vec<Option<usize>> = if shape.group {
            vec![None]
        } else {
            (0..subjects).map(Some).collect()
        };
        for subject in subjects_of_stage {
            let inputs = unit_inputs(shape, subject, subjects, stages, &unit_of);
            unit_of[stage].push(units.len());
            units.push(Unit {
                stage,
                subject,
                inputs,
            });
        }
    }
    units
}

fn unit_inputs(
    shape: &StageShape,
    subject: Option<usize>,
    subjects: usize,
    stages: &[StageShape],
    unit_of: &[Vec<usize>],
) -> Vec<UnitInput> {
    let mut inputs = Vec::new();
    for input in &shape.inputs {
        match (input, subject) {
            (None, Some(s)) => inputs.push(UnitInput::Source(s)),
            (None, None) => inputs.extend((0..subjects).map(UnitInput::Source)),
            (Some(i), _) if stages[*i].group => inputs.push(UnitInput::Unit(unit_of[*i][0])),
            (Some(i), Some(s)) => inputs.push(UnitInput::Unit(unit_of[*i][s])),
            (Some(i), None) => inputs.extend(unit_of[*i].iter().map(|&u| UnitInput::Unit(u))),
        }
    }
    inputs
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn order_is_topological_and_stable() {
        // 0 ← 2, 1 ← 0: written order 0,1,2 but 2 must come before 0.
        let g = StageGraph::build(&[vec![2], vec![0], vec![]]).unwrap();
        assert_eq!(g.order, vec![2, 0, 1]);
        let g = StageGraph::build(&[vec![], vec![], vec![0, 1]]).unwrap();
        assert_eq!(g.order, vec![0, 1, 2]);
    }

    #[test]
    fn a_cycle_names_its_stages_in_order() {
        // 0 feeds 1, 1 feeds 2, 2 feeds 0; 3 hangs off the cycle.
        let err = StageGraph::build(&[vec![2], vec![0], vec![1], vec![2]]).unwrap_err();
        assert_eq!(err.0.len(), 4);
        assert_eq!(err.0.first(), err.0.last());
        let err = StageGraph::build(&[vec![0]]).unwrap_err();
        assert_eq!(err.0, vec![0, 0]);
    }

    #[test]
    fn group_stages_take_every_subject_and_their_descendants_stay_single() {
        let stages = vec![
            StageShape {
                inputs: vec![None],
                group: false,
            },
            StageShape {
                inputs: vec![Some(0)],
                group: true,
            },
            StageShape {
                inputs: vec![Some(1)],
                group: true,
            },
        ];
        let units = expand(&[0, 1, 2], &stages, 3);
        assert_eq!(units.len(), 5);
        assert_eq!(units[0].inputs, vec![UnitInput::Source(0)]);
        assert_eq!(
            units[3].inputs,
            vec![UnitInput::Unit(0), UnitInput::Unit(1), UnitInput::Unit(2)]
        );
        assert_eq!(units[4].inputs, vec![UnitInput::Unit(3)]);
        assert_eq!(units[4].subject, None);
    }
}
