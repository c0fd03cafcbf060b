//! Phase 3, graph: the dependency graph of a checked model.
//!
//! Invariant: works on definition ids only; it never reads source text.

use petgraph::graph::{DiGraph, NodeIndex};

use crate::model::{DefKind, Model, Ref};

/// Nodes are definitions and tables; an edge `a -> b` means `b` uses `a`.
pub struct DepGraph {
    pub graph: DiGraph<Node, ()>,
    pub def_nodes: Vec<NodeIndex>,
    pub table_nodes: Vec<NodeIndex>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Node {
    Def(usize),
    Table(usize),
}

impl DepGraph {
    pub fn build(model: &Model) -> DepGraph {
        let mut graph = DiGraph::new();
        let def_nodes: Vec<NodeIndex> = (0..model.defs.len())
            .map(|i| graph.add_node(Node::Def(i)))
            .collect();
        let table_nodes: Vec<NodeIndex> = (0..model.tables.len())
            .map(|i| graph.add_node(Node::Table(i)))
            .collect();
        for (id, def) in model.defs.iter().enumerate() {
            let mut refs = Vec::new();
            def.expr.refs(&mut refs);
            match &def.kind {
                DefKind::Reservoir { capacity: Some(c) } => c.refs(&mut refs),
                DefKind::State { rate } => rate.refs(&mut refs),
                _ => {}
            }
            refs.sort_unstable();
            refs.dedup();
            for r in refs {
                let from = match r {
                    Ref::Def(d) | Ref::Capacity(d) => def_nodes[d],
                    Ref::Table(t) => table_nodes[t],
                };
                if from != def_nodes[id] {
                    graph.update_edge(from, def_nodes[id], ());
                }
            }
        }
        DepGraph {
            graph,
            def_nodes,
            table_nodes,
        }
    }

    /// The graph in Graphviz DOT, nodes labelled with name and kind. Prelude
    /// constants that nothing uses are left out.
    pub fn to_dot(&self, model: &Model) -> String {
        use std::fmt::Write;
        let mut out = String::from(
            "digraph hadal {\n  rankdir=LR;\n  node [fontname=\"Helvetica\", fontsize=10];\n",
        );
        let used = |n: NodeIndex| self.graph.neighbors_undirected(n).next().is_some();
        for (i, &n) in self.def_nodes.iter().enumerate() {
            let d = &model.defs[i];
            if d.prelude && !used(n) {
                continue;
            }
            let shape = match d.kind {
                DefKind::Reservoir { .. } => "box, style=bold",
                DefKind::State { .. } => "box",
                DefKind::Flux { .. } => "cds",
                DefKind::Param => "ellipse, style=dashed",
                DefKind::Const => "ellipse, style=dotted",
                DefKind::Output => "note",
                DefKind::Event => "diamond",
                DefKind::Table(_) => "folder",
                DefKind::Let => "ellipse",
            };
            let _ = writeln!(
                out,
                "  n{} [label=\"{}\\n{}\", shape={shape}];",
                n.index(),
                d.name,
                d.kind.word()
            );
        }
        for (t, &n) in self.table_nodes.iter().enumerate() {
            let _ = writeln!(
                out,
                "  n{} [label=\"{}\\nfile {}\", shape=folder];",
                n.index(),
                model.tables[t].name,
                model.tables[t].display_path.replace('"', "'")
            );
        }
        for e in self.graph.raw_edges() {
            let (a, b) = (e.source(), e.target());
            let keep = |n: NodeIndex| match self.graph[n] {
                Node::Def(d) => !model.defs[d].prelude || used(n),
                Node::Table(_) => true,
            };
            if keep(a) && keep(b) {
                let _ = writeln!(out, "  n{} -> n{};", a.index(), b.index());
            }
        }
        // Flux endpoints: water moving between reservoirs.
        for (i, d) in model.defs.iter().enumerate() {
            if let DefKind::Flux { from, to, .. } = d.kind {
                for (end, dir) in [(from, "in"), (to, "out")] {
                    if let crate::model::Endpoint::Reservoir(r) = end {
                        let (a, b) = if dir == "in" {
                            (self.def_nodes[r], self.def_nodes[i])
                        } else {
                            (self.def_nodes[i], self.def_nodes[r])
                        };
                        let _ = writeln!(
                            out,
                            "  n{} -> n{} [color=\"#1f5fa8\", penwidth=2];",
                            a.index(),
                            b.index()
                        );
                    }
                }
            }
        }
        out.push_str("}\n");
        out
    }
}
