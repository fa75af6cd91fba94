-- version_row: one row of table versions (sql/versions.sql), as a publish or a failed run records it.
-- grain: one row per version number.
-- inputs: table versions.
-- params: $version, $created_at, $status, $is_current, $pinned, $path, $n_nodes, $dim, $objective, $params,
--         $input_fingerprint, $counts, $timings, $metrics, $package_version, $message, $run_id (JSON columns as
--         JSON text).
insert into versions (version, created_at, status, is_current, pinned, path, n_nodes, dim, objective, params,
                      input_fingerprint, counts, timings, metrics, package_version, message, run_id)
values ($version, $created_at, $status, $is_current, $pinned, $path, $n_nodes, $dim, $objective, $params,
        $input_fingerprint, $counts, $timings, $metrics, $package_version, $message, $run_id)
