"""The data-lake path: decision and outcome logs that stay in Parquet datasets or Spark
catalog tables (``[lake]``), checked and summed into the store's bucket statistics by
Apache Spark; ``monitor.refit`` fits the windows from those buckets as usual.
``source.LakeSource`` is what ``refit`` drives."""
