//! The graph as a chain: from the one graph input, each value must feed exactly one node
//! and each node must read exactly one value that is not a constant, up to the one graph
//! output. Anything else (a branch, a merge, a node off the chain, several inputs or
//! outputs) is refused with the node and its position named. `Constant` nodes, and
//! `Identity` nodes of a constant, only name constants and are not part of the chain.

use super::Context;
use super::proto::{GraphProto, NodeProto, TensorProto, ValueInfoProto};
use crate::error::Result;
use std::collections::{HashMap, HashSet};

/// One node of the chain and its position in the file's node list (from 0).
#[derive(Debug, Clone, Copy)]
pub struct Step<'a> {
    /// The node.
    pub node: &'a NodeProto,
    /// Its index in `GraphProto.node`.
    pub pos: usize,
}

/// The graph read as a chain.
#[derive(Debug)]
pub struct Chain<'a> {
    /// The graph input the chain starts from.
    pub input: &'a ValueInfoProto,
    /// The nodes from input to output (`Constant` nodes excluded).
    pub steps: Vec<Step<'a>>,
    /// Named constant tensors: initializers and the values of `Constant` nodes.
    pub constants: HashMap<&'a str, &'a TensorProto>,
}

/// Reads `graph` as a chain (see the module comment).
pub fn chain<'a>(graph: &'a GraphProto, ctx: &Context) -> Result<Chain<'a>> {
    let mut constants: HashMap<&str, &TensorProto> = HashMap::new();
    for t in &graph.initializer {
        constants.insert(t.name.as_str(), t);
    }
    let mut nodes = Vec::new();
    for (pos, node) in graph.node.iter().enumerate() {
        if node.op_type == "Constant" && is_default_domain(node) {
            let value = node
                .attribute
                .iter()
                .find(|a| a.name == "value")
                .and_then(|a| a.t.as_ref());
            match (value, node.output.first()) {
                (Some(t), Some(out)) if node.output.len() == 1 => {
                    constants.insert(out.as_str(), t);
                }
                _ => {
                    return Err(ctx.node_error(
                        Step { node, pos },
                        "a Constant without one tensor \"value\"",
                        "receptor reads constants given as a tensor value or as initializers",
                    ));
                }
            }
        } else if node.op_type == "Identity"
            && is_default_domain(node)
            && let ([from], [out]) = (node.input.as_slice(), node.output.as_slice())
            && let Some(&t) = constants.get(from.as_str())
        {
            // An Identity of a constant is the same constant under another name (the
            // TorchScript-based exporter writes these for shared parameters).
            constants.insert(out.as_str(), t);
        } else {
            nodes.push(Step { node, pos });
        }
    }

    // Older exporters list initializers among the graph inputs too (IR version < 4).
    let inputs: Vec<&ValueInfoProto> = graph
        .input
        .iter()
        .filter(|v| !constants.contains_key(v.name.as_str()))
        .collect();
    let input = match inputs.as_slice() {
        [one] => *one,
        [] => return Err(ctx.error("the graph has no input (every input is a constant)")),
        many => {
            return Err(ctx.error(format!(
                "the graph has {} inputs ({}); receptor reads networks with one input",
                many.len(),
                names(many.iter().map(|v| v.name.as_str()))
            )));
        }
    };
    let output = match graph.output.as_slice() {
        [one] => one.name.as_str(),
        [] => return Err(ctx.error("the graph has no output")),
        many => {
            return Err(ctx.error(format!(
                "the graph has {} outputs ({}); receptor reads networks with one output",
                many.len(),
                names(many.iter().map(|v| v.name.as_str()))
            )));
        }
    };

    // Which nodes read each value.
    let mut readers: HashMap<&str, Vec<usize>> = HashMap::new();
    for (k, s) in nodes.iter().enumerate() {
        for i in &s.node.input {
            if !i.is_empty() {
                readers.entry(i.as_str()).or_default().push(k);
            }
        }
    }

    let mut steps = Vec::new();
    let mut visited = HashSet::new();
    let mut current = input.name.as_str();
    loop {
        let who = readers.get(current).map(Vec::as_slice).unwrap_or(&[]);
        if current == output {
            if let Some(&k) = who.first() {
                return Err(ctx.node_error(
                    nodes[k],
                    &format!("reads the graph's output '{output}', so the graph branches"),
                    "receptor reads a chain of operators from one input to one output",
                ));
            }
            break;
        }
        let k = match who {
            [k] => *k,
            [] => {
                return Err(ctx.error(format!(
                    "value '{current}' is read by no node and is not the graph's output '{output}'"
                )));
            }
            [_, second, ..] => {
                return Err(ctx.node_error(
                    nodes[*second],
                    &format!(
                        "value '{current}' feeds {} nodes, so the graph branches (a residual or parallel path)",
                        who.len()
                    ),
                    "receptor reads a chain of operators from one input to one output",
                ));
            }
        };
        let step = nodes[k];
        if !visited.insert(k) {
            return Err(ctx.node_error(step, "is reached twice (a cycle)", "a graph is acyclic"));
        }
        // Every other input is a constant (or an omitted optional input).
        for i in &step.node.input {
            if i != current && !i.is_empty() && !constants.contains_key(i.as_str()) {
                return Err(ctx.node_error(
                    step,
                    &format!("also reads the computed value '{i}', so two paths merge here"),
                    "receptor reads a chain of operators from one input to one output",
                ));
            }
        }
        if step.node.input.iter().filter(|i| *i == current).count() != 1 {
            return Err(ctx.node_error(
                step,
                &format!("reads '{current}' more than once"),
                "receptor reads a chain where each node reads the value before it once",
            ));
        }
        let next = match step.node.output.first() {
            Some(o) if !o.is_empty() => o.as_str(),
            _ => return Err(ctx.node_error(step, "has no output", "every node has an output")),
        };
        // Extra outputs (a Dropout's mask) must be unused.
        for extra in step.node.output.iter().skip(1) {
            if !extra.is_empty() && (readers.contains_key(extra.as_str()) || extra == output) {
                return Err(ctx.node_error(
                    step,
                    &format!("its second output '{extra}' is used"),
                    "receptor reads operators whose first output is their only one in use",
                ));
            }
        }
        steps.push(step);
        current = next;
    }
    if let Some(off) = nodes
        .iter()
        .enumerate()
        .find(|(k, _)| !visited.contains(k))
        .map(|(_, s)| *s)
    {
        return Err(ctx.node_error(
            off,
            "is not on the path from the graph's input to its output (the graph branches or has unused parts)",
            "receptor reads a chain of operators from one input to one output",
        ));
    }
    Ok(Chain {
        input,
        steps,
        constants,
    })
}

/// True when `node` belongs to the default ONNX operator set.
pub fn is_default_domain(node: &NodeProto) -> bool {
    node.domain.is_empty() || node.domain == "ai.onnx"
}

fn names<'a>(it: impl Iterator<Item = &'a str>) -> String {
    it.map(|n| format!("'{n}'")).collect::<Vec<_>>().join(", ")
}
