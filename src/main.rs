fn main() {
    println!("befit");
}
