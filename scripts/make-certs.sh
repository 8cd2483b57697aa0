#!/usr/bin/env bash
# make-certs.sh DIR [HOSTNAME...]: a small certificate authority and the certificates graft's
# TLS needs, for a lab without a PKI of its own (prefer your site's own CA where there is one).
#
# Writes into DIR (created if missing; existing certificates are never overwritten):
#   ca.pem, ca.key          the CA (10 years); ca.pem goes to every client and worker (--ca-file)
#                           and, for mutual TLS, to graftd (--client-ca); keep ca.key offline
#   server.pem, server.key  graftd's certificate (--tls-cert, --tls-key), 825 days; its names
#                           (subjectAltName) are every HOSTNAME given plus localhost, 127.0.0.1
#                           and ::1; a HOSTNAME that is an IPv4 or IPv6 address becomes an IP entry
#   client.pem, client.key  a client certificate for mutual TLS (--cert, --key), 825 days
# Keys are EC P-256, mode 0600; certificates mode 0644. Needs the openssl command (Debian's
# openssl package, installed by scripts/setup.sh).
set -euo pipefail

usage() {
  echo "usage: $0 DIR [HOSTNAME...]" >&2
  echo "  makes DIR/ca.pem, server.pem, server.key, client.pem, client.key (and ca.key)" >&2
  exit 2
}
if (($# < 1)) || [[ "$1" == -* ]]; then usage; fi
dir=$1
shift
command -v openssl > /dev/null || { echo "make-certs.sh: the openssl command is missing (scripts/setup.sh installs it)" >&2; exit 1; }

for f in ca.pem ca.key server.pem server.key client.pem client.key; do
  if [[ -e "$dir/$f" ]]; then
    echo "make-certs.sh: $dir/$f exists; certificates are never overwritten (remove them, or pick another DIR)" >&2
    exit 1
  fi
done
mkdir -p "$dir"
umask 077
work=$(mktemp -d "$dir/.make-certs.XXXXXX")
trap 'rm -rf "$work"' EXIT

# subjectAltName entries: the names given, then localhost and the loopback addresses.
san=()
add_name() {
  local n=$1 entry
  if [[ "$n" =~ ^[0-9]+\.[0-9]+\.[0-9]+\.[0-9]+$ || "$n" == *:* ]]; then entry="IP:$n"; else entry="DNS:$n"; fi
  local e
  for e in "${san[@]+"${san[@]}"}"; do [[ "$e" == "$entry" ]] && return 0; done
  san+=("$entry")
}
for h in "$@"; do
  if [[ -z "$h" || "$h" == *[[:space:],/]* ]]; then
    echo "make-certs.sh: '$h' is not a host name or address" >&2
    exit 2
  fi
  add_name "$h"
done
add_name localhost
add_name 127.0.0.1
add_name ::1
san_list=$(IFS=,; echo "${san[*]}")
server_cn=${1:-localhost}

key() { openssl genpkey -algorithm EC -pkeyopt ec_paramgen_curve:P-256 -out "$1" 2> "$work/openssl.log"; }

key "$work/ca.key"
openssl req -x509 -new -key "$work/ca.key" -sha256 -days 3650 -subj "/CN=graft lab CA ($(hostname))" \
  -addext "basicConstraints=critical,CA:TRUE" -addext "keyUsage=critical,keyCertSign,cRLSign" \
  -out "$work/ca.pem" 2>> "$work/openssl.log"

# sign NAME CN EXTENSIONS: NAME.key and NAME.pem signed by the CA.
sign() {
  local name=$1 cn=$2 ext=$3
  key "$work/$name.key"
  openssl req -new -key "$work/$name.key" -subj "/CN=$cn" -out "$work/$name.csr" 2>> "$work/openssl.log"
  printf '%b' "$ext" > "$work/$name.ext"
  openssl x509 -req -in "$work/$name.csr" -CA "$work/ca.pem" -CAkey "$work/ca.key" -CAcreateserial \
    -CAserial "$work/ca.srl" -sha256 -days 825 -extfile "$work/$name.ext" -out "$work/$name.pem" \
    2>> "$work/openssl.log"
}
sign server "$server_cn" "basicConstraints=critical,CA:FALSE\nkeyUsage=critical,digitalSignature\nextendedKeyUsage=serverAuth\nsubjectAltName=$san_list\n"
sign client "graft client" "basicConstraints=critical,CA:FALSE\nkeyUsage=critical,digitalSignature\nextendedKeyUsage=clientAuth\n"

for f in ca.key server.key client.key; do
  mv "$work/$f" "$dir/$f"
  chmod 600 "$dir/$f"
done
for f in ca.pem server.pem client.pem; do
  mv "$work/$f" "$dir/$f"
  chmod 644 "$dir/$f"
done
echo "make-certs.sh: wrote $dir/ca.pem (and ca.key), server.pem, server.key, client.pem, client.key"
names=${san_list//DNS:/}
names=${names//IP:/}
echo "  server names: ${names//,/, }"
echo "  graftd:          --tls-cert $dir/server.pem --tls-key $dir/server.key [--client-ca $dir/ca.pem]"
echo "  graft, workers:  --ca-file $dir/ca.pem [--cert $dir/client.pem --key $dir/client.key]"
