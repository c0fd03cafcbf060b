//! Phase 3, graph: the dependency graph of a checked model, and for each
//! stage the exact set of definitions its evaluation reaches.
//!
//! Invariant: works on definition ids and canonical texts only; it never
//! reads source text and never evaluates anything.

use std::collections::BTreeSet;

use petgraph::graph::{DiGraph, NodeIndex};
use petgraph::Direction;

use crate::model::{DefId, DefKind, Endpoint, Model, Ref};

/// A node: one thing that can change a result.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Node {
    /// The value of a definition. For a reservoir or a state this is the
    /// current value, a leaf: reading state is not a dependency cycle.
    Def(DefId),
    /// The capacity expression of a reservoir.
    Capacity(DefId),
    /// The rate expression of a state.
    Rate(DefId),
    /// The initial value of a reservoir or state.
    Initial(DefId),
    /// A table's data.
    Table(usize),
}

/// An edge `a -> b` means that `b` uses `a`.
pub struct DepGraph {
    pub graph: DiGraph<Node, ()>,
    index: std::collections::HashMap<Node, NodeIndex>,
}

impl DepGraph {
    pub fn build(model: &Model) -> DepGraph {
        let mut g = DepGraph {
            graph: DiGraph::new(),
            index: Default::default(),
        };
        for t in 0..model.tables.len() {
            g.node(Node::Table(t));
        }
        for (id, def) in model.defs.iter().enumerate() {
            let value = g.node(Node::Def(id));
            match &def.kind {
                DefKind::Reservoir { capacity } => {
                    let init = g.node(Node::Initial(id));
                    g.edges_from(&def.expr, init);
                    if let Some(c) = capacity {
                        let cap = g.node(Node::Capacity(id));
                        g.edges_from(c, cap);
                    }
                }
                DefKind::State { rate } => {
                    let init = g.node(Node::Initial(id));
                    g.edges_from(&def.expr, init);
                    let r = g.node(Node::Rate(id));
                    g.edges_from(rate, r);
                }
                DefKind::Table(t) => {
                    let t = g.node(Node::Table(*t));
                    g.graph.update_edge(t, value, ());
                }
                _ => g.edges_from(&def.expr, value),
            }
        }
        g
    }

    fn node(&mut self, n: Node) -> NodeIndex {
        if let Some(&i) = self.index.get(&n) {
            return i;
        }
        let i = self.graph.add_node(n);
        self.index.insert(n, i);
        i
    }

    fn edges_from(&mut self, expr: &crate::model::Expr, to: NodeIndex) {
        let mut refs = Vec::new();
        expr.refs(&mut refs);
        refs.sort_unstable();
        refs.dedup();
        for r in refs {
            let from = match r {
                Ref::Def(d) => self.node(Node::Def(d)),
                Ref::Capacity(d) => self.node(Node::Capacity(d)),
                Ref::Table(t) => self.node(Node::Table(t)),
            };
            if from != to {
                self.graph.update_edge(from, to, ());
            }
        }
    }

    /// Everything the given nodes depend on, themselves included, sorted.
    pub fn closure(&self, targets: &[Node]) -> BTreeSet<Node> {
        let mut seen = BTreeSet::new();
        let mut stack: Vec<NodeIndex> = targets
            .iter()
            .filter_map(|n| self.index.get(n).copied())
            .collect();
        while let Some(i) = stack.pop() {
            if seen.insert(self.graph[i]) {
                stack.extend(self.graph.neighbors_directed(i, Direction::Incoming));
            }
        }
        seen
    }

    /// What the solve of stage `s` evaluates: its active fluxes, every
    /// state's rate and every event, with all they depend on.
    pub fn stage_closure(&self, model: &Model, s: usize) -> BTreeSet<Node> {
        self.closure(&solve_targets(model, Some(s)))
    }

    /// The graph in Graphviz DOT. Prelude constants nothing uses are left out.
    pub fn to_dot(&self, model: &Model) -> String {
        use std::fmt::Write;
        let mut out = String::from(
            "digraph hadal {\n  rankdir=LR;\n  node [fontname=\"Helvetica\", fontsize=10];\n",
        );
        let used = |n: NodeIndex| self.graph.neighbors_undirected(n).next().is_some();
        let keep = |n: NodeIndex| match self.graph[n] {
            Node::Def(d) => !model.defs[d].prelude || used(n),
            _ => true,
        };
        for i in self.graph.node_indices() {
            if !keep(i) {
                continue;
            }
            let (label, shape) = match self.graph[i] {
                Node::Def(d) => {
                    let def = &model.defs[d];
                    let shape = match def.kind {
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
                    (format!("{}\\n{}", def.name, def.kind.word()), shape)
                }
                Node::Capacity(d) => (format!("capacity of {}", model.defs[d].name), "ellipse"),
                Node::Rate(d) => (format!("rate of {}", model.defs[d].name), "ellipse"),
                Node::Initial(d) => (format!("initial {}", model.defs[d].name), "plaintext"),
                Node::Table(t) => (
                    format!("file {}", model.tables[t].display_path.replace('"', "'")),
                    "folder",
                ),
            };
            let _ = writeln!(out, "  n{} [label=\"{label}\", shape={shape}];", i.index());
        }
        for e in self.graph.raw_edges() {
            if keep(e.source()) && keep(e.target()) {
                let _ = writeln!(out, "  n{} -> n{};", e.source().index(), e.target().index());
            }
        }
        // Water moving along fluxes, drawn bold.
        for (id, d) in model.defs.iter().enumerate() {
            if let DefKind::Flux { from, to, .. } = d.kind {
                let f = self.index[&Node::Def(id)];
                if let Endpoint::Reservoir(r) = from {
                    let _ = writeln!(
                        out,
                        "  n{} -> n{} [color=\"#1f5fa8\", penwidth=2];",
                        self.index[&Node::Def(r)].index(),
                        f.index()
                    );
                }
                if let Endpoint::Reservoir(r) = to {
                    let _ = writeln!(
                        out,
                        "  n{} -> n{} [color=\"#1f5fa8\", penwidth=2];",
                        f.index(),
                        self.index[&Node::Def(r)].index()
                    );
                }
            }
        }
        out.push_str("}\n");
        out
    }
}

/// The nodes a stage's solve evaluates directly.
pub fn solve_targets(model: &Model, stage: Option<usize>) -> Vec<Node> {
    let mut t = Vec::new();
    for (id, d) in model.defs.iter().enumerate() {
        match d.kind {
            DefKind::Flux { stage: fs, .. } if fs.is_none() || fs == stage => t.push(Node::Def(id)),
            DefKind::State { .. } => t.push(Node::Rate(id)),
            DefKind::Event => t.push(Node::Def(id)),
            _ => {}
        }
    }
    t
}

/// The canonical text of a node, independent of layout, comments and
/// declaration order: names instead of ids, numbers in internal units.
pub fn canonical_node(model: &Model, n: Node) -> String {
    match n {
        Node::Def(d) => {
            let def = &model.defs[d];
            match &def.kind {
                // The current value of a state component: its place in the
                // (name-ordered) state vector is what the solve reads.
                DefKind::Reservoir { .. } | DefKind::State { .. } => {
                    let mut out = format!("{} {} [", def.kind.word(), def.name);
                    def.dim.push_debug(&mut out);
                    out.push(']');
                    out
                }
                _ => model.canonical_def(d),
            }
        }
        Node::Capacity(d) => match &model.defs[d].kind {
            DefKind::Reservoir { capacity: Some(c) } => {
                format!(
                    "capacity {} = {}",
                    model.defs[d].name,
                    model.canonical_expr(c)
                )
            }
            _ => String::new(),
        },
        Node::Rate(d) => match &model.defs[d].kind {
            DefKind::State { rate } => format!(
                "rate {} = {}",
                model.defs[d].name,
                model.canonical_expr(rate)
            ),
            _ => String::new(),
        },
        Node::Initial(d) => format!(
            "initial {} = {}",
            model.defs[d].name,
            model.canonical_expr(&model.defs[d].expr)
        ),
        Node::Table(t) => format!("table {} {}", model.tables[t].name, model.tables[t].hash),
    }
}

/// The name of a node as a person would say it, for "why recomputed".
pub fn node_name(model: &Model, n: Node) -> String {
    match n {
        Node::Def(d) => model.defs[d].name.clone(),
        Node::Capacity(d) => format!("capacity of {}", model.defs[d].name),
        Node::Rate(d) => format!("rate of {}", model.defs[d].name),
        Node::Initial(d) => format!("initial {}", model.defs[d].name),
        Node::Table(t) => format!("table file {}", model.tables[t].display_path),
    }
}

/// Whether the value expression of a `set` line depends on `id`.
fn set_reads(g: &DepGraph, e: &crate::model::Expr, id: DefId) -> bool {
    let mut refs = Vec::new();
    e.refs(&mut refs);
    let nodes: Vec<Node> = refs
        .into_iter()
        .filter_map(|r| match r {
            Ref::Def(d) => Some(Node::Def(d)),
            _ => None,
        })
        .collect();
    g.closure(&nodes).contains(&Node::Def(id))
}

/// Every parameter's influence: the stages whose solve reaches it.
pub fn param_stages(model: &Model, g: &DepGraph) -> Vec<(DefId, Vec<usize>)> {
    let closures: Vec<BTreeSet<Node>> = (0..model.stages.len())
        .map(|s| g.stage_closure(model, s))
        .collect();
    model
        .defs
        .iter()
        .enumerate()
        .filter(|(_, d)| matches!(d.kind, DefKind::Param))
        .map(|(id, _)| {
            let stages = (0..model.stages.len())
                .filter(|&s| {
                    closures[s].contains(&Node::Def(id))
                        || model.stages[s]
                            .sets
                            .iter()
                            .any(|(p, e)| *p == id || set_reads(g, e, id))
                })
                .collect();
            (id, stages)
        })
        .collect()
}
