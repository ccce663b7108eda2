fn main() {
    println!("breakdown: work in progress");
}
