//! Data-only values while resolving: a node that depends on data and no unknown, evaluated on
//! every row (or a group's rows), for the checks that run before any run (density supports,
//! whole-number arguments, indices into vectors).
//!
//! Owns: [`Checker::data_values`] and its cache. Must not: evaluate anything that depends on
//! unknowns.

use super::{Checker, Node, NodeId};

impl Checker<'_> {
    /// The rows currently in view: all of them, or the group being resolved.
    pub(super) fn row_indices(&self) -> Vec<u32> {
        match &self.rows {
            Some(r) => r.clone(),
            None => (0..self.inputs.data.rows as u32).collect(),
        }
    }

    /// The values of the data-only node `id` on the rows in view (NaN where it would need an
    /// unknown, which a data-only node never does).
    pub(super) fn data_values(&mut self, id: NodeId) -> Vec<f64> {
        if let Some(v) = self.data_cache.get(&id) {
            return v.clone();
        }
        // The sub-graph below `id`, children before parents (ids increase upward).
        let mut need = vec![id];
        let mut seen = std::collections::HashSet::new();
        let mut order = Vec::new();
        while let Some(n) = need.pop() {
            if !seen.insert(n) {
                continue;
            }
            order.push(n);
            match self.builder.nodes[n as usize] {
                Node::Unary(_, a) => need.push(a),
                Node::Binary(_, a, b) => {
                    need.push(a);
                    need.push(b);
                }
                _ => {}
            }
        }
        order.sort_unstable();
        let rows = self.row_indices();
        let mut values: std::collections::HashMap<NodeId, Vec<f64>> = Default::default();
        for &n in &order {
            if let Some(v) = self.data_cache.get(&n) {
                values.insert(n, v.clone());
                continue;
            }
            let col: Vec<f64> = match self.builder.nodes[n as usize] {
                Node::Const(c) => vec![c; rows.len()],
                Node::Data(j) => {
                    let c = &self.inputs.data.columns[j as usize];
                    rows.iter().map(|&r| c[r as usize]).collect()
                }
                Node::Unary(op, a) => values[&a].iter().map(|&x| op.apply(x)).collect(),
                Node::Binary(op, a, b) => values[&a]
                    .iter()
                    .zip(&values[&b])
                    .map(|(&x, &y)| op.apply(x, y))
                    .collect(),
                Node::Var(_) | Node::Sum(..) => vec![f64::NAN; rows.len()],
            };
            values.insert(n, col);
        }
        let out = values.remove(&id).unwrap_or_default();
        self.data_cache.insert(id, out.clone());
        out
    }

    /// Sets the rows in view (`None`: all of them).
    pub(super) fn set_rows(&mut self, rows: Option<Vec<u32>>) -> Option<Vec<u32>> {
        self.data_cache.clear();
        std::mem::replace(&mut self.rows, rows)
    }
}
