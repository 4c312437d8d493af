//! Finding the line and column of a key in a study file, so that every error can point at it.

use toml::de::{DeTable, DeValue};

/// One step of a path into a TOML document: a key of a table or an index of an array.
#[derive(Debug, Clone, PartialEq)]
pub enum Seg {
    Key(String),
    Index(usize),
}

impl From<&str> for Seg {
    fn from(s: &str) -> Self {
        Seg::Key(s.to_string())
    }
}

impl From<usize> for Seg {
    fn from(i: usize) -> Self {
        Seg::Index(i)
    }
}

/// 1-based line and column of a byte offset.
pub fn line_col(src: &str, offset: usize) -> (usize, usize) {
    let offset = offset.min(src.len());
    let before = &src[..offset];
    let line = before.matches('\n').count() + 1;
    let col = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, col)
}

/// The (line, column) of the deepest element of `path` that exists in the document: the key
/// itself for a table entry, the element for an array index. `None` when the document does not
/// parse or the first step is absent.
pub fn locate(src: &str, path: &[Seg]) -> Option<(usize, usize)> {
    let doc = DeTable::parse(src).ok()?;
    let mut table: Option<&DeTable<'_>> = Some(doc.get_ref());
    let mut value: Option<&DeValue<'_>> = None;
    let mut best: Option<usize> = None;
    for seg in path {
        match seg {
            Seg::Key(k) => {
                let t = match (table, value) {
                    (Some(t), _) => t,
                    (None, Some(DeValue::Table(t))) => t,
                    _ => break,
                };
                let Some((key, v)) = t.iter().find(|(key, _)| key.get_ref().as_ref() == k) else {
                    break;
                };
                best = Some(key.span().start);
                table = None;
                value = Some(v.get_ref());
            }
            Seg::Index(i) => {
                let Some(DeValue::Array(a)) = value else { break };
                let Some(v) = a.get(*i) else { break };
                best = Some(v.span().start);
                table = None;
                value = Some(v.get_ref());
            }
        }
    }
    best.map(|o| line_col(src, o))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_keys_and_array_elements() {
        let src = "[study]\nname = \"x\"\n[grid]\nproposal_scale = [0.1, 0.2]\n[[target]]\nfamily = \"gaussian\"\n[[target]]\nfamily = \"banana\"\ndim = 2\n";
        assert_eq!(locate(src, &["study".into(), "name".into()]), Some((2, 1)));
        assert_eq!(
            locate(src, &["grid".into(), "proposal_scale".into(), 1.into()]),
            Some((4, 24))
        );
        assert_eq!(
            locate(src, &["target".into(), 1.into(), "dim".into()]),
            Some((9, 1))
        );
        // A missing key points at the deepest existing element.
        assert_eq!(
            locate(src, &["target".into(), 1.into(), "nope".into()]),
            locate(src, &["target".into(), 1.into()])
        );
    }
}
