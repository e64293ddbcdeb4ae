# Before the config file is loaded: refuse one that is not a YAML mapping, naming the file and
# the line (the loader's own message names neither). Its keys are validated in common.smk.
import sys

sys.path.insert(0, workflow.basedir)
from snakemake.exceptions import WorkflowError
from tessera.errors import TesseraInputError
from tessera.workflow.config import check_config_file

# the one place naming the study's config file (the Snakefile's configfile: reads it here)
CONFIG_FILE = "config/config.yaml"

try:
    check_config_file(CONFIG_FILE)
except TesseraInputError as error:
    raise WorkflowError(f"invalid input: {error}") from None
