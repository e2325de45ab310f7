//! Per-thread pools of buffers reused from frame to frame: the engine's large scratch vectors are
//! the same size every frame, and taking fresh ones from the system allocator each time costs
//! page faults.

/// Define `$take() -> Vec<$t>` (an empty vector, with the capacity of one given back earlier when
/// there is one) and `$give(Vec<$t>)` (give a vector back; a few are kept per thread).
macro_rules! typed_pool {
    ($take:ident, $give:ident, $t:ty, $store:ident) => {
        thread_local! {
            static $store: std::cell::RefCell<Vec<Vec<$t>>> = const { std::cell::RefCell::new(Vec::new()) };
        }
        /// An empty vector, with the capacity of one given back earlier when there is one.
        pub fn $take() -> Vec<$t> {
            $store.with(|p| p.borrow_mut().pop()).unwrap_or_default()
        }
        /// Give a vector back for reuse (a few are kept per thread).
        pub fn $give(mut v: Vec<$t>) {
            v.clear();
            $store.with(|p| {
                let mut p = p.borrow_mut();
                if p.len() < 16 {
                    p.push(v);
                }
            });
        }
    };
}
pub(crate) use typed_pool;
