pub fn run(_a: crate::cli::DemoArgs, _o: &crate::output::Output) -> anyhow::Result<()> {
    anyhow::bail!("demo is not written yet")
}
