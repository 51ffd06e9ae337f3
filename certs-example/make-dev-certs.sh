#!/bin/sh
# Makes development certificates for likenessd in DIR with the openssl command:
#   ca.crt, ca.key           a development CA (EC P-256, 10 years)
#   server.crt, server.key   the service's certificate for localhost,
#                            127.0.0.1 and ::1 (825 days)
#   client.crt, client.key   a client certificate for mutual TLS,
#                            subject CN=visitor-desk-1,O=Example Visitor Desk
# Keys are written with mode 0600. Existing files are kept (the script only
# makes what is missing) unless --force is given, which makes everything anew.
# For development and tests only: a production service gets its certificate
# from the organisation's own CA.
set -eu

usage() {
    echo "usage: $0 [--force] DIR" >&2
    echo "  makes a development CA, a server certificate for localhost and a client" >&2
    echo "  certificate in DIR (created if absent); --force replaces existing files" >&2
    exit 2
}

force=0
dir=
for a in "$@"; do
    case "$a" in
        --force) force=1 ;;
        -h|--help) usage ;;
        -*) echo "$0: unknown option '$a'" >&2; usage ;;
        *) [ -z "$dir" ] || usage; dir=$a ;;
    esac
done
[ -n "$dir" ] || usage
command -v openssl >/dev/null 2>&1 || {
    echo "$0: the openssl command is missing; install it (Debian: apt-get install openssl)" >&2
    exit 1
}

# CA/Browser Forum Baseline Requirements once capped TLS server certificates
# at 825 days (ballot 193); clients such as Apple's still refuse longer ones.
SERVER_DAYS=825
CLIENT_DAYS=825
CA_DAYS=3650
CLIENT_SUBJECT="/O=Example Visitor Desk/CN=visitor-desk-1"

mkdir -p "$dir"
umask 077
tmp=$(mktemp -d "$dir/.make-dev-certs.XXXXXX")
trap 'rm -rf "$tmp"' EXIT

if [ "$force" = 1 ]; then
    rm -f "$dir/ca.key" "$dir/ca.crt" "$dir/server.key" "$dir/server.crt" \
          "$dir/client.key" "$dir/client.crt"
fi

made=
say() { echo "$*"; }

# A random 159-bit positive serial (RFC 5280 section 4.1.2.2: unique, at
# most 20 octets).
serial() { echo "0x$(openssl rand -hex 20 | sed 's/^./7/')"; }

newkey() { # newkey FILE: an EC P-256 key (FIPS 186-4 curve, RFC 5480 name prime256v1)
    openssl genpkey -algorithm EC -pkeyopt ec_paramgen_curve:P-256 \
        -pkeyopt ec_param_enc:named_curve -out "$1" 2>/dev/null
    chmod 600 "$1"
}

if [ ! -e "$dir/ca.key" ] || [ ! -e "$dir/ca.crt" ]; then
    for f in server.crt client.crt; do
        if [ -e "$dir/$f" ]; then
            echo "$0: $dir/$f exists but the CA that issued it (ca.key, ca.crt) does not;" \
                 "run again with --force to make a new set" >&2
            exit 1
        fi
    done
    newkey "$tmp/ca.key"
    openssl req -new -x509 -key "$tmp/ca.key" -out "$tmp/ca.crt" -days "$CA_DAYS" -sha256 \
        -set_serial "$(serial)" \
        -subj "/O=Example Visitor Desk/CN=Example Visitor Desk development CA" \
        -addext "basicConstraints=critical,CA:TRUE,pathlen:0" \
        -addext "keyUsage=critical,keyCertSign,cRLSign" \
        -addext "subjectKeyIdentifier=hash"
    mv "$tmp/ca.key" "$dir/ca.key"
    chmod 644 "$tmp/ca.crt"
    mv "$tmp/ca.crt" "$dir/ca.crt"
    made="$made ca.crt ca.key"
    say "made $dir/ca.crt (development CA, $CA_DAYS days) and $dir/ca.key (mode 0600)"
fi

# leaf NAME DAYS SUBJECT EXTENSIONS: a key and a certificate issued by the CA.
leaf() {
    name=$1 days=$2 subject=$3 ext=$4
    [ -e "$dir/$name.key" ] && [ -e "$dir/$name.crt" ] && return 0
    newkey "$tmp/$name.key"
    openssl req -new -key "$tmp/$name.key" -subj "$subject" -out "$tmp/$name.csr"
    printf '%s\n' "$ext" > "$tmp/$name.ext"
    openssl x509 -req -in "$tmp/$name.csr" -CA "$dir/ca.crt" -CAkey "$dir/ca.key" \
        -set_serial "$(serial)" -days "$days" -sha256 -extfile "$tmp/$name.ext" \
        -out "$tmp/$name.crt" 2>/dev/null
    mv "$tmp/$name.key" "$dir/$name.key"
    chmod 644 "$tmp/$name.crt"
    mv "$tmp/$name.crt" "$dir/$name.crt"
    made="$made $name.crt $name.key"
}

leaf server "$SERVER_DAYS" "/O=Example Visitor Desk/CN=localhost" \
"basicConstraints=critical,CA:FALSE
keyUsage=critical,digitalSignature
extendedKeyUsage=serverAuth
subjectAltName=DNS:localhost,IP:127.0.0.1,IP:::1
subjectKeyIdentifier=hash
authorityKeyIdentifier=keyid"
case "$made" in *server.crt*)
    say "made $dir/server.crt (DNS:localhost, IP:127.0.0.1, IP:::1; $SERVER_DAYS days) and $dir/server.key (mode 0600)" ;;
esac

leaf client "$CLIENT_DAYS" "$CLIENT_SUBJECT" \
"basicConstraints=critical,CA:FALSE
keyUsage=critical,digitalSignature
extendedKeyUsage=clientAuth
subjectKeyIdentifier=hash
authorityKeyIdentifier=keyid"
case "$made" in *client.crt*)
    say "made $dir/client.crt ($CLIENT_DAYS days) and $dir/client.key (mode 0600)" ;;
esac

if [ -z "$made" ]; then
    say "nothing to do: $dir already holds ca.crt, server.crt and client.crt with their keys (--force replaces them)"
fi

# Both leaves must chain to the CA; a failure here means a broken set.
openssl verify -CAfile "$dir/ca.crt" "$dir/server.crt" "$dir/client.crt" >/dev/null

subject=$(openssl x509 -in "$dir/client.crt" -noout -subject -nameopt RFC2253 | sed 's/^subject=//')
say "client certificate subject (for a [client:NAME] section's subject): $subject"
