-- wrk script: a cached resubmission (POST /v1/studies of a study whose tasks are all stored).
-- Submit the same body once and wait for it to finish, then:
--   wrk -t2 -c20 -d8s --latency -s benchmarks/wrk-post.lua http://127.0.0.1:8000/v1/studies
wrk.method = "POST"
wrk.body   = '{"model":{"name":"b","variables":["a","b","c"],"cliques":[["a","b","c"]]},"connectivities":["line"],"compile_only":true,"seeds":1}'
wrk.headers["Content-Type"] = "application/json"
