//! Maps key paths (`features[2].window`) to line and column in the YAML text.
//!
//! serde_yaml reports positions only for the first syntax or type error; problems found
//! after parsing (a duplicate name, an unknown source) are located here by walking the
//! YAML event stream once.

use std::collections::HashMap;
use yaml_rust2::parser::{Event, MarkedEventReceiver, Parser};
use yaml_rust2::scanner::Marker;

/// Line and column (1-based) of each key path in a YAML document.
#[derive(Debug, Default)]
pub struct Positions {
    at: HashMap<String, (usize, usize)>,
}

enum Frame {
    Map {
        path: String,
        key: Option<String>,
        seen_key: bool,
    },
    Seq {
        path: String,
        index: usize,
    },
}

#[derive(Default)]
struct Walker {
    stack: Vec<Frame>,
    at: HashMap<String, (usize, usize)>,
    done: bool,
}

fn join(parent: &str, key: &str) -> String {
    if parent.is_empty() {
        key.to_string()
    } else {
        format!("{parent}.{key}")
    }
}

impl Walker {
    /// The path of the node that starts now, or `None` if it is a mapping key.
    fn child_path(&self) -> Option<String> {
        match self.stack.last() {
            None => Some(String::new()),
            Some(Frame::Map { key: None, .. }) => None,
            Some(Frame::Map {
                path, key: Some(k), ..
            }) => Some(join(path, k)),
            Some(Frame::Seq { path, index }) => Some(format!("{path}[{index}]")),
        }
    }

    fn child_done(&mut self) {
        match self.stack.last_mut() {
            Some(Frame::Map { key, .. }) => *key = None,
            Some(Frame::Seq { index, .. }) => *index += 1,
            None => self.done = true,
        }
    }

    fn record(&mut self, path: String, mark: Marker, is_value: bool) {
        let pos = (mark.line(), mark.col() + 1);
        if is_value {
            // A scalar value's own position is more precise than its key's.
            self.at.insert(path, pos);
        } else {
            self.at.entry(path).or_insert(pos);
        }
    }
}

impl MarkedEventReceiver for Walker {
    fn on_event(&mut self, ev: Event, mark: Marker) {
        if self.done {
            return;
        }
        match ev {
            Event::Scalar(text, ..) => match self.child_path() {
                None => {
                    let (parent, first) = match self.stack.last() {
                        Some(Frame::Map { path, seen_key, .. }) => (path.clone(), !seen_key),
                        _ => (String::new(), false),
                    };
                    if first {
                        // The parser marks a block mapping's start after its first key;
                        // the first key's own position is where a reader looks.
                        self.at
                            .insert(parent.clone(), (mark.line(), mark.col() + 1));
                    }
                    self.record(join(&parent, &text), mark, false);
                    if let Some(Frame::Map { key, seen_key, .. }) = self.stack.last_mut() {
                        *key = Some(text);
                        *seen_key = true;
                    }
                }
                Some(path) => {
                    self.record(path, mark, true);
                    self.child_done();
                }
            },
            Event::Alias(_) => {
                if let Some(path) = self.child_path() {
                    self.record(path, mark, true);
                    self.child_done();
                } else if let Some(Frame::Map { key, .. }) = self.stack.last_mut() {
                    *key = Some("<alias>".to_string());
                }
            }
            Event::MappingStart(..) | Event::SequenceStart(..) => {
                // A collection used as a mapping key has no useful path; give it a placeholder.
                let path = self
                    .child_path()
                    .unwrap_or_else(|| "<complex key>".to_string());
                self.record(path.clone(), mark, false);
                if matches!(ev, Event::MappingStart(..)) {
                    self.stack.push(Frame::Map {
                        path,
                        key: None,
                        seen_key: false,
                    });
                } else {
                    self.stack.push(Frame::Seq { path, index: 0 });
                }
            }
            Event::MappingEnd | Event::SequenceEnd => {
                self.stack.pop();
                self.child_done();
            }
            _ => {}
        }
    }
}

impl Positions {
    /// Indexes `text`; text that is not valid YAML gives a partial (possibly empty) index.
    pub fn index(text: &str) -> Positions {
        let mut walker = Walker::default();
        let mut parser = Parser::new_from_str(text);
        let _ = parser.load(&mut walker, false);
        Positions { at: walker.at }
    }

    /// The position of `path`, or of its nearest ancestor that has one.
    pub fn find(&self, path: &str) -> Option<(usize, usize)> {
        let mut p = path.to_string();
        loop {
            if let Some(pos) = self.at.get(&p) {
                return Some(*pos);
            }
            let cut = p.rfind(['.', '['])?;
            p.truncate(cut);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_nested_paths() {
        let text = "a: 1\nfeatures:\n  - name: x\n    windows: [7d, 28d]\n  - name: y\n";
        let p = Positions::index(text);
        assert_eq!(p.find("a"), Some((1, 4)));
        assert_eq!(p.find("features[0].name"), Some((3, 11)));
        assert_eq!(p.find("features[0].windows[1]"), Some((4, 19)));
        assert_eq!(p.find("features[1].name"), Some((5, 11)));
        assert_eq!(p.find("features[1].agg"), Some((5, 5)));
    }
}
