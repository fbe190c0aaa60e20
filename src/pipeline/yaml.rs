//! A *marked* YAML tree: every node knows the line and column it came from.
//!
//! serde_yaml's `Value` forgets positions, and a pipeline error that cannot point at its line is
//! half an error message, so the tree is built here from yaml-rust2's event parser. Aliases are
//! expanded while building, under a node budget: a document whose aliases multiply (an "alias
//! bomb") is reported as an error instead of exhausting memory.
//!
//! Duplicate keys are kept (the raw model reports them, together with every other problem).
//! Scalars keep their text and whether they were quoted; typing (number, bool, null) happens in
//! [`Node::to_json`] following the YAML 1.2 core schema, so `"50"` stays a string while `50` and
//! `50.0` become numbers.

use std::collections::HashMap;

use serde_json::Value;
use yaml_rust2::parser::{Event, Parser};
use yaml_rust2::scanner::{Marker, TScalarStyle};

/// Most nodes a document may expand to (aliases included). Pipelines have a few hundred.
pub const NODE_BUDGET: usize = 100_000;

/// Where a node came from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Origin {
    /// The pipeline file, at a 1-based line and column.
    File {
        /// 1-based line.
        line: usize,
        /// 1-based column.
        col: usize,
    },
    /// The n-th `--set` override of the command line.
    Override(usize),
}

/// A YAML node with its origin.
#[derive(Clone, Debug, PartialEq)]
pub struct Node {
    /// Where the node starts.
    pub origin: Origin,
    /// The node itself.
    pub kind: NodeKind,
}

/// The three kinds of YAML node.
#[derive(Clone, Debug, PartialEq)]
pub enum NodeKind {
    /// A scalar's text, and whether it was written plain (unquoted).
    Scalar {
        /// The text.
        text: String,
        /// True for plain scalars, which may be numbers, booleans or null.
        plain: bool,
    },
    /// A sequence.
    Seq(Vec<Node>),
    /// A mapping, in file order.
    Map(Vec<(Node, Node)>),
}

/// A document that is not well-formed YAML, or too large once aliases are expanded.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("{line}:{col}: {message}")]
pub struct YamlError {
    /// 1-based line.
    pub line: usize,
    /// 1-based column.
    pub col: usize,
    /// What went wrong.
    pub message: String,
}

impl Node {
    /// The scalar text, if this is a scalar.
    pub fn as_str(&self) -> Option<&str> {
        match &self.kind {
            NodeKind::Scalar { text, .. } => Some(text),
            _ => None,
        }
    }

    /// The entries, if this is a mapping.
    pub fn as_map(&self) -> Option<&[(Node, Node)]> {
        match &self.kind {
            NodeKind::Map(entries) => Some(entries),
            _ => None,
        }
    }

    /// A short name of the node's kind, for "expected …, found …" messages.
    pub fn kind_name(&self) -> &'static str {
        match &self.kind {
            NodeKind::Scalar { .. } => match self.to_json() {
                Value::Null => "null",
                Value::Bool(_) => "a boolean",
                Value::Number(_) => "a number",
                _ => "a string",
            },
            NodeKind::Seq(_) => "a list",
            NodeKind::Map(_) => "a mapping",
        }
    }

    /// The node as JSON, typing plain scalars by the YAML 1.2 core schema.
    pub fn to_json(&self) -> Value {
        match &self.kind {
            NodeKind::Scalar { text, plain: true } => plain_scalar(text),
            NodeKind::Scalar { text, plain: false } => Value::String(text.clone()),
            NodeKind::Seq(items) => Value::Array(items.iter().map(Node::to_json).collect()),
            NodeKind::Map(entries) => Value::Object(
                entries
                    .iter()
                    .map(|(k, v)| (k.as_str().unwrap_or_default().to_string(), v.to_json()))
                    .collect(),
            ),
        }
    }

    /// The node at exactly this path, if there is one.
    pub fn at<'a>(&'a self, path: &[PathStep]) -> Option<&'a Node> {
        let Some((step, rest)) = path.split_first() else {
            return Some(self);
        };
        let next = match (&self.kind, step) {
            (NodeKind::Map(entries), PathStep::Key(key)) => entries
                .iter()
                .find(|(k, _)| k.as_str() == Some(key.as_str()))
                .map(|(_, v)| v),
            (NodeKind::Seq(items), PathStep::Index(i)) => items.get(*i),
            _ => None,
        };
        next?.at(rest)
    }

    /// The node at a dotted path (`freqs.to`, `window[1]`), or the deepest node on the way there.
    pub fn deepest<'a>(&'a self, path: &[PathStep]) -> &'a Node {
        let mut node = self;
        for step in path {
            let next = match (&node.kind, step) {
                (NodeKind::Map(entries), PathStep::Key(key)) => entries
                    .iter()
                    .find(|(k, _)| k.as_str() == Some(key.as_str()))
                    .map(|(_, v)| v),
                (NodeKind::Seq(items), PathStep::Index(i)) => items.get(*i),
                _ => None,
            };
            match next {
                Some(n) => node = n,
                None => break,
            }
        }
        node
    }
}

/// One step of a parameter path.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum PathStep {
    /// A mapping key.
    Key(String),
    /// A list index.
    Index(usize),
}

/// Split a dotted path as serde_path_to_error writes it (`a.b[2].c`) into steps.
pub fn split_path(path: &str) -> Vec<PathStep> {
    let mut steps = Vec::new();
    for part in path.split('.').filter(|p| !p.is_empty()) {
        let mut rest = part;
        if let Some(open) = rest.find('[') {
            if open > 0 {
                steps.push(PathStep::Key(rest[..open].to_string()));
            }
            rest = &rest[open..];
            while let Some(stripped) = rest.strip_prefix('[') {
                let close = stripped.find(']').unwrap_or(stripped.len());
                if let Ok(i) = stripped[..close].parse() {
                    steps.push(PathStep::Index(i));
                }
                rest = stripped.get(close + 1..).unwrap_or("");
            }
        } else {
            steps.push(PathStep::Key(rest.to_string()));
        }
    }
    steps
}

/// Type a plain scalar: null, booleans, integers, floats (YAML 1.2 core schema), else a string.
fn plain_scalar(text: &str) -> Value {
    match text {
        "" | "~" | "null" | "Null" | "NULL" => return Value::Null,
        "true" | "True" | "TRUE" => return Value::Bool(true),
        "false" | "False" | "FALSE" => return Value::Bool(false),
        _ => {}
    }
    if let Ok(i) = text.parse::<i64>() {
        return Value::from(i);
    }
    let looks_numeric = text
        .chars()
        .all(|c| c.is_ascii_digit() || matches!(c, '.' | 'e' | 'E' | '+' | '-'))
        && text.chars().any(|c| c.is_ascii_digit());
    if looks_numeric {
        if let Some(n) = text
            .parse::<f64>()
            .ok()
            .and_then(serde_json::Number::from_f64)
        {
            return Value::Number(n);
        }
    }
    Value::String(text.to_string())
}

/// Parse one YAML document into a marked tree (an empty document is an empty mapping).
pub fn parse(text: &str, origin_of: impl Fn(usize, usize) -> Origin) -> Result<Node, YamlError> {
    let mut builder = Builder {
        parser: Parser::new_from_str(text),
        anchors: HashMap::new(),
        budget: NODE_BUDGET,
        origin_of: &origin_of,
    };
    builder.document()
}

struct Builder<'a, F: Fn(usize, usize) -> Origin> {
    parser: Parser<std::str::Chars<'a>>,
    anchors: HashMap<usize, Node>,
    budget: usize,
    origin_of: &'a F,
}

impl<F: Fn(usize, usize) -> Origin> Builder<'_, F> {
    fn next(&mut self) -> Result<(Event, Marker), YamlError> {
        self.parser.next_token().map_err(|e| YamlError {
            line: e.marker().line(),
            col: e.marker().col() + 1,
            message: e.info().to_string(),
        })
    }

    fn origin(&self, mark: Marker) -> Origin {
        (self.origin_of)(mark.line(), mark.col() + 1)
    }

    fn document(&mut self) -> Result<Node, YamlError> {
        loop {
            let (event, mark) = self.next()?;
            match event {
                Event::StreamStart | Event::DocumentStart => {}
                Event::StreamEnd => {
                    return Ok(Node {
                        origin: self.origin(mark),
                        kind: NodeKind::Map(Vec::new()),
                    })
                }
                other => {
                    let node = self.node(other, mark)?;
                    return self.end_of_document(node);
                }
            }
        }
    }

    /// A pipeline is one document: a second one is an error rather than silently ignored.
    fn end_of_document(&mut self, node: Node) -> Result<Node, YamlError> {
        loop {
            let (event, mark) = self.next()?;
            match event {
                Event::DocumentEnd => {}
                Event::StreamEnd => return Ok(node),
                _ => {
                    return Err(YamlError {
                        line: mark.line(),
                        col: mark.col() + 1,
                        message: "a pipeline file holds one YAML document, found a second".into(),
                    })
                }
            }
        }
    }

    fn spend(&mut self, nodes: usize, mark: Marker) -> Result<(), YamlError> {
        if nodes > self.budget {
            return Err(YamlError {
                line: mark.line(),
                col: mark.col() + 1,
                message: format!(
                    "the document expands to more than {NODE_BUDGET} nodes (aliases that multiply?)"
                ),
            });
        }
        self.budget -= nodes;
        Ok(())
    }

    fn node(&mut self, event: Event, mark: Marker) -> Result<Node, YamlError> {
        let origin = self.origin(mark);
        match event {
            Event::Scalar(text, style, anchor, _) => {
                self.spend(1, mark)?;
                let plain = style == TScalarStyle::Plain;
                let node = Node {
                    origin,
                    kind: NodeKind::Scalar { text, plain },
                };
                Ok(self.remember(anchor, node))
            }
            Event::SequenceStart(anchor, _) => {
                self.spend(1, mark)?;
                let items = self.seq_items()?;
                let node = Node {
                    origin,
                    kind: NodeKind::Seq(items),
                };
                Ok(self.remember(anchor, node))
            }
            Event::MappingStart(anchor, _) => {
                self.spend(1, mark)?;
                let entries = self.map_entries()?;
                let node = Node {
                    origin,
                    kind: NodeKind::Map(entries),
                };
                Ok(self.remember(anchor, node))
            }
            Event::Alias(id) => self.alias(id, mark),
            other => Err(YamlError {
                line: mark.line(),
                col: mark.col() + 1,
                message: format!("unexpected YAML event {other:?}"),
            }),
        }
    }

    fn alias(&mut self, id: usize, mark: Marker) -> Result<Node, YamlError> {
        let Some(target) = self.anchors.get(&id) else {
            return Err(YamlError {
                line: mark.line(),
                col: mark.col() + 1,
                message: "alias to an unknown anchor".into(),
            });
        };
        let size = count_nodes(target);
        let node = target.clone();
        self.spend(size, mark)?;
        Ok(node)
    }

    fn remember(&mut self, anchor: usize, node: Node) -> Node {
        if anchor > 0 {
            self.anchors.insert(anchor, node.clone());
        }
        node
    }

    fn seq_items(&mut self) -> Result<Vec<Node>, YamlError> {
        let mut items = Vec::new();
        loop {
            let (event, mark) = self.next()?;
            if event == Event::SequenceEnd {
                return Ok(items);
            }
            items.push(self.node(event, mark)?);
        }
    }

    fn map_entries(&mut self) -> Result<Vec<(Node, Node)>, YamlError> {
        let mut entries: Vec<(Node, Node)> = Vec::new();
        loop {
            let (event, mark) = self.next()?;
            if event == Event::MappingEnd {
                return Ok(entries);
            }
            let key = self.node(event, mark)?;
            let (event, mark) = self.next()?;
            let value = self.node(event, mark)?;
            if key.as_str().is_none() {
                return Err(YamlError {
                    line: mark.line(),
                    col: mark.col() + 1,
                    message: format!("mapping keys must be text, found {}", key.kind_name()),
                });
            }
            entries.push((key, value));
        }
    }
}

/// Line and column of an origin (0, 0 for overrides).
pub fn file_position(origin: Origin) -> (usize, usize) {
    match origin {
        Origin::File { line, col } => (line, col),
        Origin::Override(_) => (0, 0),
    }
}

fn count_nodes(node: &Node) -> usize {
    match &node.kind {
        NodeKind::Scalar { .. } => 1,
        NodeKind::Seq(items) => 1 + items.iter().map(count_nodes).sum::<usize>(),
        NodeKind::Map(entries) => {
            1 + entries
                .iter()
                .map(|(k, v)| count_nodes(k) + count_nodes(v))
                .sum::<usize>()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn file(line: usize, col: usize) -> Origin {
        Origin::File { line, col }
    }

    #[test]
    fn nodes_know_their_line_and_column() {
        let doc = parse("a: 1\nb:\n  c: [x, 2.5]\n", file).unwrap();
        let map = doc.as_map().unwrap();
        assert_eq!(map[1].0.origin, file(2, 1));
        let c = doc.deepest(&split_path("b.c[1]"));
        assert_eq!(c.origin, file(3, 10));
        assert_eq!(doc.to_json(), json!({"a": 1, "b": {"c": ["x", 2.5]}}));
    }

    #[test]
    fn quoted_numbers_stay_text_and_exponents_are_numbers() {
        // YAML 1.2 core schema: quoted scalars are strings; `150e-6` is a float.
        let doc = parse("a: \"50\"\nb: 150e-6\nc: ~\nd: true\ne: cue-a\n", file).unwrap();
        assert_eq!(
            doc.to_json(),
            json!({"a": "50", "b": 150e-6, "c": null, "d": true, "e": "cue-a"})
        );
    }

    #[test]
    fn aliases_expand_but_bombs_are_refused() {
        let doc = parse("a: &x [1, 2]\nb: *x\n", file).unwrap();
        assert_eq!(doc.to_json(), json!({"a": [1, 2], "b": [1, 2]}));
        let mut bomb = String::from("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n");
        for i in 1..8 {
            let p = i - 1;
            bomb.push_str(&format!(
                "a{i}: &a{i} [*a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}, *a{p}]\n"
            ));
        }
        let err = parse(&bomb, file).unwrap_err();
        assert!(err.message.contains("more than"), "{err}");
    }

    #[test]
    fn syntax_errors_have_positions() {
        // Duplicate keys are kept here and reported by the raw model, with all other problems.
        let doc = parse("a: 1\na: 2\n", file).unwrap();
        assert_eq!(doc.as_map().unwrap().len(), 2);
        let err = parse("a: [1, 2\nb: 3\n", file).unwrap_err();
        assert!(err.line >= 1, "{err}");
    }

    #[test]
    fn paths_split_like_serde_path_to_error_writes_them() {
        assert_eq!(
            split_path("freqs.to"),
            vec![PathStep::Key("freqs".into()), PathStep::Key("to".into())]
        );
        assert_eq!(
            split_path("window[1]"),
            vec![PathStep::Key("window".into()), PathStep::Index(1)]
        );
    }
}
