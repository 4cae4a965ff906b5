from panelpipe.runs import enter_step, seal_step
from panelpipe.steps import script_guard

enter_step("seal")
with script_guard(snakemake.log[0]):
    seal_step(list(snakemake.input), snakemake.output.seal)
