//! JSON side files (the shard index) parsed strictly: a key that appears twice in any object is
//! an error naming the key, never a silent last-wins overwrite.

use std::cell::RefCell;
use std::fmt;

use serde::de::{DeserializeSeed, Deserializer, Error as _, MapAccess, SeqAccess, Visitor};
use serde_json::{Map, Number, Value};

/// Why a side file's JSON was refused.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum JsonProblem {
    /// A key appears twice in one object.
    DuplicateKey(String),
    /// Not JSON, or JSON but not an object.
    Malformed(String),
}

impl fmt::Display for JsonProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            JsonProblem::DuplicateKey(k) => write!(f, "names the key {k:?} twice"),
            JsonProblem::Malformed(m) => f.write_str(m),
        }
    }
}

/// Parse `bytes` as one JSON object, keys in file order, refusing duplicate keys at any depth.
pub fn parse_object(bytes: &[u8]) -> Result<Map<String, Value>, JsonProblem> {
    let duplicate = RefCell::new(None);
    let mut de = serde_json::Deserializer::from_slice(bytes);
    let parsed = Strict(&duplicate)
        .deserialize(&mut de)
        .and_then(|v| de.end().map(|_| v));
    if let Some(key) = duplicate.into_inner() {
        return Err(JsonProblem::DuplicateKey(key));
    }
    match parsed {
        Ok(Value::Object(map)) => Ok(map),
        Ok(_) => Err(JsonProblem::Malformed("is JSON but not an object".into())),
        Err(e) => Err(JsonProblem::Malformed(format!("is not valid JSON: {e}"))),
    }
}

/// A JSON value whose objects are checked for duplicate keys; the first duplicate is recorded
/// in the cell and parsing stops.
struct Strict<'a>(&'a RefCell<Option<String>>);

impl<'de> DeserializeSeed<'de> for Strict<'_> {
    type Value = Value;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Value, D::Error> {
        d.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for Strict<'_> {
    type Value = Value;

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("any JSON value")
    }
    fn visit_unit<E>(self) -> Result<Value, E> {
        Ok(Value::Null)
    }
    fn visit_bool<E>(self, v: bool) -> Result<Value, E> {
        Ok(Value::Bool(v))
    }
    fn visit_i64<E>(self, v: i64) -> Result<Value, E> {
        Ok(Value::from(v))
    }
    fn visit_u64<E>(self, v: u64) -> Result<Value, E> {
        Ok(Value::from(v))
    }
    fn visit_f64<E>(self, v: f64) -> Result<Value, E> {
        Ok(Number::from_f64(v).map_or(Value::Null, Value::Number))
    }
    fn visit_str<E>(self, v: &str) -> Result<Value, E> {
        Ok(Value::String(v.to_owned()))
    }
    fn visit_string<E>(self, v: String) -> Result<Value, E> {
        Ok(Value::String(v))
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Value, A::Error> {
        let mut items = Vec::new();
        while let Some(v) = seq.next_element_seed(Strict(self.0))? {
            items.push(v);
        }
        Ok(Value::Array(items))
    }
    fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> Result<Value, A::Error> {
        let mut map = Map::new();
        while let Some(key) = access.next_key::<String>()? {
            if map.contains_key(&key) {
                *self.0.borrow_mut() = Some(key);
                return Err(A::Error::custom("duplicate key"));
            }
            let value = access.next_value_seed(Strict(self.0))?;
            map.insert(key, value);
        }
        Ok(Value::Object(map))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn duplicates_at_any_depth_are_named() {
        assert_eq!(
            parse_object(br#"{"a":1,"b":{"x":1,"x":2}}"#),
            Err(JsonProblem::DuplicateKey("x".into()))
        );
        assert_eq!(
            parse_object(br#"{"a":1,"a":1}"#),
            Err(JsonProblem::DuplicateKey("a".into()))
        );
        let ok = parse_object(br#"{"b":[1,2.5,null,true,"s"],"a":{"x":-1}}"#).unwrap();
        assert_eq!(ok.keys().collect::<Vec<_>>(), ["b", "a"], "file order kept");
        assert!(parse_object(b"[1]").is_err());
        assert!(parse_object(b"{} x").is_err());
    }
}
