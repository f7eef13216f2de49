//! `casebook` command-line entry point (skeleton).
fn main() -> anyhow::Result<()> {
    let f = hdf5_metno::File::create("/tmp/casebook-skeleton.h5")?;
    f.create_group("impurity")?;
    println!("{}", model_solid::model::DEMO_NAME);
    Ok(())
}
