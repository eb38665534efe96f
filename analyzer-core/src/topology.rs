//! Topology checks that find singular networks before any matrix is factored, and name the
//! nodes or parts to blame.
//!
//! * A node (or group of nodes) with no path to ground through parts that carry a current
//!   fixed by the node voltages is floating: its voltage is undetermined. If such a group
//!   touches current sources, they form a cut-set of current sources; at 0 Hz capacitors are
//!   open, so a group reached only through capacitors floats there.
//! * A loop of parts that each fix a voltage (voltage sources, voltage-output controlled
//!   sources, op-amp outputs, which are referred to ground, and at 0 Hz inductors, which are
//!   shorts there) over-determines the loop's voltages.

use crate::network::{Network, NodeId, PartId, PartKind};
use std::collections::{BTreeSet, VecDeque};

/// A singular topology, with the nodes or parts that make it so.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum TopologyError {
    /// Nodes with no path to ground.
    #[error("{}", floating_message(.nodes, .current_sources, .capacitors))]
    Floating {
        /// The nodes of the floating group.
        nodes: Vec<String>,
        /// Current sources that are the group's only connection, if any.
        current_sources: Vec<String>,
        /// At 0 Hz: capacitors that would connect the group at any other frequency.
        capacitors: Vec<String>,
    },
    /// A loop of voltage-fixing parts.
    #[error("{}", loop_message(.parts, .at_dc))]
    VoltageLoop {
        /// The parts around the loop.
        parts: Vec<String>,
        /// Whether inductors (shorts at 0 Hz) are part of the loop.
        at_dc: bool,
    },
}

fn list(names: &[String]) -> String {
    names.join(", ")
}

fn floating_message(nodes: &[String], current_sources: &[String], capacitors: &[String]) -> String {
    let (what, it) = if nodes.len() == 1 {
        ("node", "it")
    } else {
        ("nodes", "them")
    };
    let mut m = format!(
        "{what} {} {} no path to gnd",
        list(nodes),
        if nodes.len() == 1 { "has" } else { "have" }
    );
    if !capacitors.is_empty() {
        m += &format!(
            " at 0 Hz: {} reached only through capacitor(s) {}, which are open there; start the sweep above 0 Hz or add a DC path (e.g. a large resistor to gnd)",
            if nodes.len() == 1 { "it is" } else { "they are" },
            list(capacitors)
        );
    } else if !current_sources.is_empty() {
        m += &format!(
            ": current source(s) {} form a cut-set, so the voltage there is undetermined; add a resistor from {it} to gnd",
            list(current_sources)
        );
    } else {
        m += &format!(": connect {it} to the rest of the network or to gnd");
    }
    m
}

fn loop_message(parts: &[String], at_dc: &bool) -> String {
    let mut m = format!(
        "parts {} form a loop of voltage sources{}: the loop voltage is fixed twice",
        list(parts),
        if *at_dc {
            " and inductors (shorts at 0 Hz)"
        } else {
            ""
        }
    );
    m += "; put a resistance in the loop";
    if *at_dc {
        m += " or start the sweep above 0 Hz";
    }
    m
}

struct Dsu {
    parent: Vec<usize>,
}

impl Dsu {
    fn new(n: usize) -> Self {
        Dsu {
            parent: (0..n).collect(),
        }
    }
    fn find(&mut self, mut x: usize) -> usize {
        while self.parent[x] != x {
            self.parent[x] = self.parent[self.parent[x]];
            x = self.parent[x];
        }
        x
    }
    fn union(&mut self, a: usize, b: usize) -> bool {
        let (ra, rb) = (self.find(a), self.find(b));
        if ra == rb {
            return false;
        }
        self.parent[ra] = rb;
        true
    }
}

/// The pair of nodes a part joins for the given purpose, if it does.
fn conductive_edge(kind: &PartKind, at_dc: bool) -> Option<(NodeId, NodeId)> {
    match *kind {
        PartKind::Resistor { a, b, .. } | PartKind::Inductor { a, b, .. } => Some((a, b)),
        PartKind::Capacitor { a, b, .. } => (!at_dc).then_some((a, b)),
        PartKind::VoltageSource { plus, minus, .. }
        | PartKind::Vcvs { plus, minus, .. }
        | PartKind::Ccvs { plus, minus, .. } => Some((plus, minus)),
        PartKind::IdealOpamp { output, .. } | PartKind::SinglePoleOpamp { output, .. } => {
            Some((output, NodeId::GROUND))
        }
        _ => None,
    }
}

fn voltage_edge(kind: &PartKind, at_dc: bool) -> Option<(NodeId, NodeId)> {
    match *kind {
        PartKind::Inductor { a, b, .. } => at_dc.then_some((a, b)),
        PartKind::VoltageSource { plus, minus, .. }
        | PartKind::Vcvs { plus, minus, .. }
        | PartKind::Ccvs { plus, minus, .. } => Some((plus, minus)),
        PartKind::IdealOpamp { output, .. } | PartKind::SinglePoleOpamp { output, .. } => {
            Some((output, NodeId::GROUND))
        }
        _ => None,
    }
}

/// Checks the network for floating nodes and voltage loops, at 0 Hz when `at_dc`.
pub fn check(net: &Network, at_dc: bool) -> Result<(), TopologyError> {
    check_loops(net, at_dc)?;
    check_floating(net, at_dc)
}

fn check_floating(net: &Network, at_dc: bool) -> Result<(), TopologyError> {
    let n = net.node_count();
    let mut dsu = Dsu::new(n);
    for p in net.parts() {
        if let Some((a, b)) = conductive_edge(&p.kind, at_dc) {
            dsu.union(a.0, b.0);
        }
    }
    let ground = dsu.find(0);
    // First floating group in node order.
    let Some(first) = (1..n).find(|&i| dsu.find(i) != ground) else {
        return Ok(());
    };
    let root = dsu.find(first);
    let in_group = |d: &mut Dsu, node: NodeId| d.find(node.0) == root;
    let nodes: Vec<String> = (1..n)
        .filter(|&i| dsu.find(i) == root)
        .map(|i| net.node_name(NodeId(i)).to_string())
        .collect();
    let mut current_sources = Vec::new();
    let mut capacitors = Vec::new();
    for p in net.parts() {
        let touches = |d: &mut Dsu, a: NodeId, b: NodeId| in_group(d, a) != in_group(d, b);
        match p.kind {
            PartKind::CurrentSource { from, to, .. }
            | PartKind::Vccs { from, to, .. }
            | PartKind::Cccs { from, to, .. }
                if touches(&mut dsu, from, to) =>
            {
                current_sources.push(p.name.clone());
            }
            PartKind::Capacitor { a, b, .. } if at_dc && touches(&mut dsu, a, b) => {
                capacitors.push(p.name.clone());
            }
            _ => {}
        }
    }
    Err(TopologyError::Floating {
        nodes,
        current_sources,
        capacitors,
    })
}

fn check_loops(net: &Network, at_dc: bool) -> Result<(), TopologyError> {
    let n = net.node_count();
    let mut dsu = Dsu::new(n);
    // The accepted edges form a forest; keep its adjacency to name a loop when one closes.
    let mut adjacency: Vec<Vec<(usize, PartId)>> = vec![Vec::new(); n];
    for (i, p) in net.parts().iter().enumerate() {
        let Some((a, b)) = voltage_edge(&p.kind, at_dc) else {
            continue;
        };
        if dsu.union(a.0, b.0) {
            adjacency[a.0].push((b.0, PartId(i)));
            adjacency[b.0].push((a.0, PartId(i)));
            continue;
        }
        let mut names: BTreeSet<String> = path(&adjacency, a.0, b.0)
            .into_iter()
            .filter_map(|id| net.part(id).map(|p| p.name.clone()))
            .collect();
        names.insert(p.name.clone());
        return Err(TopologyError::VoltageLoop {
            parts: names.into_iter().collect(),
            at_dc: at_dc
                && net
                    .parts()
                    .iter()
                    .any(|q| matches!(q.kind, PartKind::Inductor { .. })),
        });
    }
    Ok(())
}

/// The parts on the forest path from `a` to `b` (breadth-first).
fn path(adjacency: &[Vec<(usize, PartId)>], a: usize, b: usize) -> Vec<PartId> {
    let mut came: Vec<Option<(usize, PartId)>> = vec![None; adjacency.len()];
    let mut seen = vec![false; adjacency.len()];
    let mut queue = VecDeque::from([a]);
    seen[a] = true;
    while let Some(u) = queue.pop_front() {
        if u == b {
            break;
        }
        for &(v, id) in &adjacency[u] {
            if !seen[v] {
                seen[v] = true;
                came[v] = Some((u, id));
                queue.push_back(v);
            }
        }
    }
    let mut out = Vec::new();
    let mut at = b;
    while let Some((prev, id)) = came[at] {
        out.push(id);
        at = prev;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::NetworkBuilder;

    #[test]
    fn names_floating_nodes_and_loops() {
        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.resistor("R1", "x", "y", 1.0).unwrap();
        let net = b.build().unwrap();
        assert_eq!(
            check(&net, false).unwrap_err().to_string(),
            "nodes x, y have no path to gnd: connect them to the rest of the network or to gnd"
        );

        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.voltage_source("V2", "a", "b", 1.0.into()).unwrap();
        b.voltage_source("V3", "b", "gnd", 1.0.into()).unwrap();
        let net = b.build().unwrap();
        assert_eq!(
            check(&net, false).unwrap_err(),
            TopologyError::VoltageLoop {
                parts: vec!["V1".into(), "V2".into(), "V3".into()],
                at_dc: false
            }
        );

        let mut b = NetworkBuilder::new("t");
        b.voltage_source("V1", "a", "gnd", 1.0.into()).unwrap();
        b.capacitor("C1", "a", "b", 1e-6).unwrap();
        b.capacitor("C2", "b", "gnd", 1e-6).unwrap();
        let net = b.build().unwrap();
        assert!(check(&net, false).is_ok());
        assert!(matches!(
            check(&net, true),
            Err(TopologyError::Floating { ref capacitors, .. }) if capacitors.len() == 2
        ));
    }
}
