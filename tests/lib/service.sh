# A throwaway likenessd for the shell benchmarks and scans, sourced by
# tests/bench/bench_http.sh, tests/harden/soak.sh, tests/harden/tls_scan.sh
# and tests/deploy/bench_replicas.sh. The caller has set ROOT (the source
# tree) and BIN (the directory holding likeness and likenessd) and runs from
# ROOT; every function works in a directory the caller owns and removes.
#   lk_certs_and_keys DIR            DIR/tls (development certificates), DIR/keys
#   lk_write_config DIR PORT [SERVER_LINES] [SECTIONS]
#                                    DIR/cfg.ini: TLS, the default model, SQLite
#                                    store DIR/store.db, key file DIR/keys
#   lk_service_setup DIR PORT [SERVER_LINES] [SECTIONS]   both of the above
#   lk_api_key CFG NAME SCOPES       prints a new API key
#   lk_service_start DIR             likenessd --config DIR/cfg.ini in the
#                                    background, stderr to DIR/log; sets LK_PID
#   lk_wait_healthy URL CA_FILE TRIES [PID]
#   lk_enrol_template BASE_URL CA_FILE TOKEN IMAGE   prints the template id
#   lk_multipart_part BOUNDARY NAME FILE / lk_multipart_field BOUNDARY NAME VALUE
#   lk_verification_bodies DIR BOUNDARY PROBE REFERENCE TEMPLATE_ID
#                                    DIR/pair.body and DIR/tpl.body

lk_certs_and_keys() {
  bash "$ROOT/certs-example/make-dev-certs.sh" "$1/tls" >/dev/null || return 1
  # The build may be sanitized: a short-lived command's leak report is not
  # what these scripts look at. Its messages are shown only when it fails.
  ASAN_OPTIONS=detect_leaks=0 "$BIN/likeness" keys init --key-file "$1/keys" \
      >/dev/null 2>"$1/keys-init.err" || { cat "$1/keys-init.err" >&2; return 1; }
}

lk_write_config() {
  {
    printf '[server]\nport = %s\ncert_file = tls/server.crt\nkey_file = tls/server.key\n' "$2"
    if [ -n "${3:-}" ]; then printf '%s\n' "$3"; fi
    printf '[model]\nfile = %s/models/likeness-lfw.lkmodel\n' "$ROOT"
    printf '[store]\nurl = sqlite:%s/store.db\n[keys]\nfile = keys\n' "$1"
    if [ -n "${4:-}" ]; then printf '%s\n' "$4"; fi
  } > "$1/cfg.ini"
}

lk_service_setup() {
  lk_certs_and_keys "$1" || return 1
  lk_write_config "$@"
}

lk_api_key() {
  "$BIN/likeness" keys api-create --config "$1" --name "$2" --scopes "$3" 2>/dev/null
}

lk_service_start() {
  "$BIN/likenessd" --config "$1/cfg.ini" 2>"$1/log" &
  LK_PID=$!
}

# Polls URL every 0.2 s, at most TRIES times, until it answers; fails when it
# never does or when process PID (if given) has exited.
lk_wait_healthy() {
  local _
  for _ in $(seq "$3"); do
    if [ -n "${4:-}" ] && ! kill -0 "$4" 2>/dev/null; then return 1; fi
    curl -s --cacert "$2" "$1" >/dev/null 2>&1 && return 0
    sleep 0.2
  done
  return 1
}

lk_enrol_template() {
  curl -sS --cacert "$2" "$1/v1/templates" -H "Authorization: Bearer $3" -F "image=@$4" |
    /usr/bin/python3 -c 'import json,sys; print(json.load(sys.stdin)["template_id"])'
}

# multipart/form-data (RFC 7578): a JPEG file part, a text field, the end.
lk_multipart_part() {
  printf -- '--%s\r\nContent-Disposition: form-data; name="%s"; filename="%s"\r\nContent-Type: image/jpeg\r\n\r\n' \
      "$1" "$2" "$(basename "$3")"
  cat "$3"
  printf '\r\n'
}
lk_multipart_field() {
  printf -- '--%s\r\nContent-Disposition: form-data; name="%s"\r\n\r\n%s\r\n' "$1" "$2" "$3"
}
lk_multipart_end() {
  printf -- '--%s--\r\n' "$1"
}

# The two verification bodies the benchmarks post with tests/bench/wrk_post.lua:
# the image pair (probe, reference) and the probe plus a template id.
lk_verification_bodies() {
  { lk_multipart_part "$2" probe "$3"; lk_multipart_part "$2" reference "$4"
    lk_multipart_end "$2"; } > "$1/pair.body"
  { lk_multipart_part "$2" probe "$3"; lk_multipart_field "$2" template_id "$5"
    lk_multipart_end "$2"; } > "$1/tpl.body"
}

# lk_load_service DIR PORT NAME BOUNDARY PROBE REFERENCE: the service the
# load scripts (bench_http.sh, soak.sh) drive at saturation: queue_depth 256,
# no rate limit, an API key NAME (verify, enrol) exported as TOKEN, started
# (LK_PID) and healthy, and DIR/pair.body and DIR/tpl.body with CTYPE
# exported for tests/bench/wrk_post.lua.
lk_load_service() {
  lk_service_setup "$1" "$2" "queue_depth = 256" "[limits]
rate_per_second = 1000000
burst = 1000000" || return 1
  TOKEN=$(lk_api_key "$1/cfg.ini" "$3" verify,enrol) || return 1
  export TOKEN
  lk_service_start "$1"
  lk_wait_healthy "https://127.0.0.1:$2/healthz" "$1/tls/ca.crt" 100 "$LK_PID" ||
    { echo "likenessd did not start; its log:" >&2; tail -20 "$1/log" >&2; return 1; }
  local tid
  tid=$(lk_enrol_template "https://127.0.0.1:$2" "$1/tls/ca.crt" "$TOKEN" "$6") || return 1
  lk_verification_bodies "$1" "$4" "$5" "$6" "$tid"
  export CTYPE="multipart/form-data; boundary=$4"
}
