#!/usr/bin/env bash
# Make the TLS certificates of a foldfarm cluster with openssl: a certificate authority of your own,
# and a certificate + key signed by it for each role (default: scheduler, worker, client).
#
#   bash deploy/make-certificates.sh ~/.foldfarm/tls            # scheduler, worker, client
#   bash deploy/make-certificates.sh ~/.foldfarm/tls coordinator # one more later (reuses the CA)
#
# Dask's TLS is mutual: the scheduler, every worker and every client show a certificate signed by
# the CA, and each checks the other's, so nobody without one can connect.  Keep DIR readable by you
# alone (this script makes it so); keys are written with mode 600.  ca.key signs new certificates:
# keep it, or delete it once you have made all you need.  See deploy/README.md, "TLS".
set -euo pipefail
dir="${1:?usage: make-certificates.sh DIR [ROLE...]}"
shift
roles=("$@")
[[ ${#roles[@]} -gt 0 ]] || roles=(scheduler worker client)
days="${FOLDFARM_CERT_DAYS:-3650}"

umask 077
mkdir -p "$dir"
chmod 700 "$dir"
cd "$dir"
if [[ ! -e ca.pem ]]; then
    openssl req -x509 -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes -keyout ca.key -out ca.pem -days "$days" \
        -subj "/CN=foldfarm cluster CA" 2>/dev/null
    echo "made the certificate authority: $dir/ca.pem (and its key ca.key)"
fi
for role in "${roles[@]}"; do
    if [[ -e "$role.pem" ]]; then
        echo "$dir/$role.pem exists; left alone"
        continue
    fi
    openssl req -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes -keyout "$role.key" -out "$role.csr" -subj "/CN=foldfarm $role" 2>/dev/null
    openssl x509 -req -in "$role.csr" -CA ca.pem -CAkey ca.key -CAcreateserial -out "$role.pem" -days "$days" \
        2>/dev/null
    rm -f "$role.csr"
    echo "made $dir/$role.pem and $dir/$role.key"
done
