fn main() {
    println!("assay: commands arrive with the study layer");
}
