//! Typed copies of a table's columns, made once per loaded table and shared by every
//! analysis that reads them: the impact page's corrections, its projection and its bounds
//! read the same respondent columns side by side, and each copy of a respondent column is
//! a pass over every respondent into fresh memory. A loaded table never changes (a reload
//! makes a new one, with an empty set), so a copy never goes stale. Only the analyses that
//! many requests repeat ask for shared copies; a one-off read (the command line's
//! microdata fit) takes a plain copy that it frees when done.

use std::collections::HashMap;
use std::sync::{Arc, Mutex, OnceLock};

/// A String column as level indices (in order of first appearance) and the levels.
pub type Factor = (Vec<Option<usize>>, Vec<String>);

#[derive(Default)]
pub struct SharedColumns {
    numbers: Slots<Vec<Option<f64>>>,
    integers: Slots<Vec<Option<i64>>>,
    factors: Slots<Factor>,
}

impl std::fmt::Debug for SharedColumns {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SharedColumns")
            .field("numbers", &self.numbers.len())
            .field("integers", &self.integers.len())
            .field("factors", &self.factors.len())
            .finish()
    }
}

impl SharedColumns {
    pub fn numbers(
        &self,
        column: &str,
        make: impl FnOnce() -> Vec<Option<f64>>,
    ) -> Arc<Vec<Option<f64>>> {
        self.numbers.get(column, make)
    }

    pub fn integers(
        &self,
        column: &str,
        make: impl FnOnce() -> Vec<Option<i64>>,
    ) -> Arc<Vec<Option<i64>>> {
        self.integers.get(column, make)
    }

    pub fn factor(&self, column: &str, make: impl FnOnce() -> Factor) -> Arc<Factor> {
        self.factors.get(column, make)
    }
}

/// One slot per column name; a slot is filled once, and requests that arrive while it is
/// being filled wait for that copy instead of making their own.
struct Slots<T> {
    slots: Mutex<HashMap<String, Arc<OnceLock<Arc<T>>>>>,
}

impl<T> Default for Slots<T> {
    fn default() -> Self {
        Slots {
            slots: Mutex::new(HashMap::new()),
        }
    }
}

impl<T> Slots<T> {
    fn get(&self, column: &str, make: impl FnOnce() -> T) -> Arc<T> {
        let slot = {
            let mut slots = self.slots.lock().unwrap_or_else(|e| e.into_inner());
            slots.entry(column.to_string()).or_default().clone()
        };
        slot.get_or_init(|| Arc::new(make())).clone()
    }

    fn len(&self) -> usize {
        self.slots.lock().map(|s| s.len()).unwrap_or(0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_column_is_copied_once_and_shared() {
        // Common practice: the second request gets the first copy, not a new one.
        let shared = SharedColumns::default();
        let mut made = 0;
        let a = shared.numbers("y", || {
            made += 1;
            vec![Some(1.0), None]
        });
        let b = shared.numbers("y", || {
            made += 1;
            vec![]
        });
        assert_eq!(made, 1);
        assert!(Arc::ptr_eq(&a, &b));
        assert_eq!(*b, vec![Some(1.0), None]);
        let c = shared.numbers("z", || vec![Some(2.0)]);
        assert_eq!(*c, vec![Some(2.0)]);
    }
}
