fn main() -> nice_plug_xtask::Result<()> {
    nice_plug_xtask::main()
}
