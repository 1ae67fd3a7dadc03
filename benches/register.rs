fn main() { eprintln!("benchmark not written yet"); }
