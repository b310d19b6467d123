
# The example's round protocol before it capped local work, configured devices after the
# selection and paced check-ins: for tests whose closed forms or expectations are built on
# devices that start at acceptance, an unpaced server and uncapped training.
CLASSIC_ROUNDS = [
    "rounds.pacing=null",
    "rounds.in_flight=1",
    "rounds.secure_aggregation=null",
    "rounds.configure=at-acceptance",
    "rounds.over_selection=1.3",
    "workload.max_examples=null",
    "workload.crash_rate=0.05/h",
]
