// Temporary helper (not to be committed): draw figures and the report of a dir.
fn main() {
    let dir = std::path::PathBuf::from(std::env::args().nth(1).unwrap());
    let kg = std::env::args().nth(2).is_some();
    let opts = hadal::figures::RunOptions {
        inventory: if kg {
            hadal::figures::InventoryUnit::Kg
        } else {
            hadal::figures::InventoryUnit::OceanMasses
        },
    };
    for (n, b) in hadal::figures::draw_dir(&dir, &opts).unwrap() {
        std::fs::write(dir.join(&n), b).unwrap();
        println!("{n}");
    }
    std::fs::write(
        dir.join("report.html"),
        hadal::figures::html::report(&dir).unwrap(),
    )
    .unwrap();
}
