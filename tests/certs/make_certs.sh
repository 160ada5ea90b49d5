#!/bin/sh
# Regenerates the test-only TLS files in this folder with the openssl command line.
# Run from this folder: sh make_certs.sh. The CA keys are thrown away after signing.
set -eu
days=7305  # 20 years, so the tests do not start failing when a certificate expires
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

cat > "$work/server.ext" <<'EXT'
basicConstraints = critical, CA:FALSE
keyUsage = critical, digitalSignature
extendedKeyUsage = serverAuth
subjectAltName = DNS:localhost, IP:127.0.0.1
subjectKeyIdentifier = hash
authorityKeyIdentifier = keyid
EXT

make_ca() {  # $1 = file stem, $2 = common name
    openssl req -x509 -new -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes \
        -keyout "$work/$1.key" -out "$1.pem" -days "$days" -subj "/O=formgate tests/CN=$2" \
        -addext "basicConstraints=critical,CA:TRUE" \
        -addext "keyUsage=critical,keyCertSign,cRLSign" \
        -addext "subjectKeyIdentifier=hash"
}

make_ca ca "formgate test CA"
make_ca other-ca "formgate unrelated test CA"

openssl req -new -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes \
    -keyout server.key -out "$work/server.csr" -subj "/O=formgate tests/CN=localhost"
openssl x509 -req -in "$work/server.csr" -CA ca.pem -CAkey "$work/ca.key" -CAcreateserial \
    -CAserial "$work/ca.srl" -out server.pem -days "$days" -extfile "$work/server.ext"
chmod 644 server.key
