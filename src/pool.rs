//! Per-thread pools of buffers reused from frame to frame: the engine's large scratch vectors are
//! the same size every frame, and taking fresh ones from the system allocator each time costs
//! page faults.

/// Define `$take() -> Vec<$t>` (an empty vector, with the capacity of one given back earlier when
/// there is one) and `$give(Vec<$t>)` (give a vector back; a few are kept per thread). The form
/// `typed_pool!($give, $t, $store, sized = $sized)` defines `$give` and `$sized(len, fill) -> Vec<$t>`: a vector of `len` entries, which are those of
/// a vector of that length given back earlier when there is one (stale values: the caller writes
/// every entry before reading it; no fill pass), else `fill`.
macro_rules! typed_pool {
    ($take:ident, $give:ident, $t:ty, $store:ident) => {
        thread_local! {
            static $store: std::cell::RefCell<Vec<Vec<$t>>> = const { std::cell::RefCell::new(Vec::new()) };
        }
        /// An empty vector, with the capacity of one given back earlier when there is one.
        pub fn $take() -> Vec<$t> {
            let mut v = $store.with(|p| p.borrow_mut().pop()).unwrap_or_default();
            v.clear();
            v
        }
        /// Give a vector back for reuse (a few are kept per thread, with their entries).
        pub fn $give(v: Vec<$t>) {
            $store.with(|p| {
                let mut p = p.borrow_mut();
                if p.len() < 16 {
                    p.push(v);
                }
            });
        }
    };
    ($give:ident, $t:ty, $store:ident, sized = $sized:ident) => {
        thread_local! {
            static $store: std::cell::RefCell<Vec<Vec<$t>>> = const { std::cell::RefCell::new(Vec::new()) };
        }
        /// Give a vector back for reuse (a few are kept per thread, with their entries).
        pub fn $give(v: Vec<$t>) {
            $store.with(|p| {
                let mut p = p.borrow_mut();
                if p.len() < 16 {
                    p.push(v);
                }
            });
        }
        /// A vector of `len` entries: one of that length given back earlier, its entries as they
        /// were (every one must be written before it is read), or else `len` copies of `fill`.
        pub fn $sized(len: usize, fill: $t) -> Vec<$t> {
            let kept = $store.with(|p| {
                let mut p = p.borrow_mut();
                match p.iter().rposition(|v| v.len() == len) {
                    Some(i) => Some(p.remove(i)),
                    None => p.pop(),
                }
            });
            let mut v = kept.unwrap_or_default();
            if v.len() != len {
                v.clear();
                v.resize(len, fill);
            }
            v
        }
    };
}
pub(crate) use typed_pool;
