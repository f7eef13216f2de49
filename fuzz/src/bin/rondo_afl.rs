//! The AFL++ entry point (persistent mode): every input goes through `rondo_fuzz::run`.
//! Build with `cargo afl build --release`; run through `bash scripts/fuzz`.

fn main() {
    rondo_fuzz::campaign::base();
    afl::fuzz!(|data: &[u8]| {
        rondo_fuzz::run(data);
    });
}
