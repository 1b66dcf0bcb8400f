#!/bin/sh
# A stand-in batch system for the tests (Snakemake's generic cluster executor calls it as its submit
# command): runs the job script given as the last argument as a separate background process, records
# the job in submitted.txt beside this run's job scripts and prints the process id as the job id.
jobscript="$1"
sh "$jobscript" > "$jobscript.log" 2>&1 < /dev/null &
echo "$! $(basename "$jobscript")" >> "${MOVIEPROC_TEST_SUBMITTED:?set by the test}"
echo "$!"
