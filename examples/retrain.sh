#!/bin/sh
# The example job's posting and deploy steps in shell (README, "Wiring tidegate into a
# retraining job"). Set TIDEGATE_URL, TIDEGATE_TOKEN (a trainer token for the model), MODEL,
# META (the post's fields as JSON), SAMPLE (Parquet, Arrow or CSV) and DEPLOY (a command).
tidegate submit "$META" --model "$MODEL" --sample "$SAMPLE" --timeout 300 > /dev/null
case $? in
  0|3) ;;                                      # 0 serves now, 3 held: ship what serves
  4) echo "post rejected: fix the job" >&2; exit 4 ;;
  *) echo "tidegate unreachable: deploying nothing" >&2; exit 5 ;;
esac
KEY=$(tidegate serving "$MODEL") || exit 5
$DEPLOY "$KEY"
